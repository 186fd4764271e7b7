//! Reading a rendered terminal view in tests: draw an `App` into ratatui's
//! `TestBackend` and look for text on the screen.

use ebb::tui::App;
use ratatui::Terminal;
use ratatui::backend::TestBackend;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;

/// Draws `app` into a `width`×`height` test terminal.
pub fn draw(app: &mut App, width: u16, height: u16) -> Buffer {
    app.resize(Rect::new(0, 0, width, height));
    let mut terminal = Terminal::new(TestBackend::new(width, height)).unwrap();
    terminal
        .draw(|frame| frame.render_widget(&*app, frame.area()))
        .unwrap();
    terminal.backend().buffer().clone()
}

/// Every row of the screen as text.
pub fn rows(buf: &Buffer) -> Vec<String> {
    (0..buf.area.height)
        .map(|y| (0..buf.area.width).map(|x| buf[(x, y)].symbol()).collect())
        .collect()
}

/// The whole screen, rows joined by newlines (for failure messages).
pub fn screen(buf: &Buffer) -> String {
    rows(buf).join("\n")
}

/// The first cell where `needle` starts, as (column, row).
#[track_caller]
pub fn find(buf: &Buffer, needle: &str) -> (u16, u16) {
    for (y, row) in rows(buf).iter().enumerate() {
        if let Some(at) = row.find(needle) {
            return (row[..at].chars().count() as u16, y as u16);
        }
    }
    panic!("{needle:?} is not on screen:\n{}", screen(buf));
}

/// The text of the row holding `needle`.
#[track_caller]
pub fn row_with(buf: &Buffer, needle: &str) -> String {
    let (_, y) = find(buf, needle);
    rows(buf)[y as usize].clone()
}

/// True when `needle` is somewhere on the screen.
pub fn contains(buf: &Buffer, needle: &str) -> bool {
    rows(buf).iter().any(|row| row.contains(needle))
}

/// The numbers in `text`, words split at spaces, parentheses and commas.
pub fn numbers_in(text: &str) -> Vec<f64> {
    text.split(|c: char| c.is_whitespace() || c == '(' || c == ')' || c == ',')
        .filter_map(|word| word.parse::<f64>().ok())
        .collect()
}

//! Helpers for pane tests: an app on the teaching demo and the text of a rendered buffer.

use crate::tui::app::App;
use ratatui::buffer::Buffer;

/// Each row of `buf` as text.
pub fn rows(buf: &Buffer) -> Vec<String> {
    let area = buf.area;
    (area.y..area.y + area.height).map(|y| (area.x..area.x + area.width).map(|x| buf[(x, y)].symbol()).collect::<String>()).collect()
}

/// Renders the whole view of `app` at `width`×`height`.
pub fn screen(app: &mut App, width: u16, height: u16) -> Buffer {
    let area = ratatui::layout::Rect::new(0, 0, width, height);
    app.resize(area);
    let mut buf = Buffer::empty(area);
    ratatui::widgets::Widget::render(&*app, area, &mut buf);
    buf
}

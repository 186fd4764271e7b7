//! Every theme file in themes/ loads, is built into the binary, and the
//! colour-blind theme keeps the flag kinds apart under simulated red-green
//! colour blindness (the three diagnosis roles included).

use ebb::tui::{SHIPPED, Theme};
use ratatui::style::Color;
use std::path::Path;

#[test]
fn every_shipped_theme_file_loads_and_is_built_in() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("themes");
    let mut names: Vec<String> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|entry| entry.unwrap().path())
        .filter(|path| path.extension().is_some_and(|ext| ext == "ron"))
        .map(|path| {
            let theme =
                Theme::resolve(path.to_str().unwrap()).unwrap_or_else(|error| panic!("{error}"));
            let stem = path.file_stem().unwrap().to_str().unwrap().to_string();
            assert_eq!(
                theme.name,
                stem,
                "{} names itself differently",
                path.display()
            );
            assert_eq!(
                Some(&theme),
                Theme::shipped(&stem).as_ref(),
                "{stem} is not built in"
            );
            stem
        })
        .collect();
    names.sort();
    let mut shipped: Vec<String> = SHIPPED.iter().map(|(name, _)| name.to_string()).collect();
    shipped.sort();
    assert_eq!(names, shipped);
    assert_eq!(Theme::default_theme().name, "dark");
}

#[test]
fn a_missing_theme_file_is_one_clear_line() {
    let error = Theme::resolve("no/such/theme.ron").unwrap_err().to_string();
    assert!(
        error.starts_with("no/such/theme.ron: cannot read the theme"),
        "{error}"
    );
    assert!(
        error.contains("dark, light, contrast, colorblind"),
        "{error}"
    );
}

/// sRGB to linear light (IEC 61966-2-1:1999, the sRGB transfer function).
fn linear(channel: u8) -> f64 {
    let c = channel as f64 / 255.0;
    if c <= 0.04045 {
        c / 12.92
    } else {
        ((c + 0.055) / 1.055).powf(2.4)
    }
}

fn rgb(color: Option<Color>) -> [f64; 3] {
    match color {
        Some(Color::Rgb(r, g, b)) => [linear(r), linear(g), linear(b)],
        other => panic!("the colour-blind theme uses #rrggbb colours, found {other:?}"),
    }
}

fn simulate(matrix: &[[f64; 3]; 3], color: [f64; 3]) -> [f64; 3] {
    [0, 1, 2].map(|row| (0..3).map(|col| matrix[row][col] * color[col]).sum())
}

#[test]
fn the_colorblind_theme_keeps_flags_apart_under_red_green_deficiency() {
    // Severity-1.0 simulation matrices for linear RGB from Machado, Oliveira & Fernandes,
    // "A Physiologically-based Model for Simulation of Color Vision Deficiency",
    // IEEE TVCG 15(6), 2009, Table 1 (values from memory).
    const DEUTERANOPIA: [[f64; 3]; 3] = [
        [0.367322, 0.860646, -0.227968],
        [0.280085, 0.672501, 0.047413],
        [-0.011820, 0.042940, 0.968881],
    ];
    const PROTANOPIA: [[f64; 3]; 3] = [
        [0.152286, 1.052583, -0.204868],
        [0.114503, 0.786281, 0.099216],
        [-0.003882, -0.048116, 1.051998],
    ];
    let theme = Theme::shipped("colorblind").unwrap();
    let roles = [
        ("flag_value", theme.flag_value.fg),
        ("flag_partial", theme.flag_partial.fg),
        ("flag_adjoint", theme.flag_adjoint.fg),
        ("flag_origin", theme.flag_origin.fg),
        ("flag_large", theme.flag_large.fg),
        ("flag_small", theme.flag_small.fg),
        ("done", theme.done.fg),
        ("current", theme.current.fg),
    ];
    for matrix in [DEUTERANOPIA, PROTANOPIA] {
        for (at, (name, color)) in roles.iter().enumerate() {
            // Each flag against every other role; done against current.
            for (other, other_color) in &roles[at + 1..] {
                let compared = name.starts_with("flag") || (*name == "done" && *other == "current");
                if !compared {
                    continue;
                }
                let (a, b) = (
                    simulate(&matrix, rgb(*color)),
                    simulate(&matrix, rgb(*other_color)),
                );
                let distance = a
                    .iter()
                    .zip(&b)
                    .map(|(x, y)| (x - y).powi(2))
                    .sum::<f64>()
                    .sqrt();
                // 0.3 in linear RGB is a clearly visible difference (common practice, not a standard).
                assert!(
                    distance > 0.3,
                    "{name} and {other} are {distance:.3} apart when simulated"
                );
            }
        }
    }
}

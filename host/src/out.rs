//! Output helpers: terminal detection, NO_COLOR, durations for people
//! (dates: [`crate::timefmt`]).

use std::io::{self, IsTerminal, Write};

/// How to write to stdout.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Style {
    /// stdout is a terminal (live status line allowed).
    pub tty: bool,
    /// Colour allowed (a terminal, and `NO_COLOR` unset or empty, per no-color.org).
    pub color: bool,
}

impl Style {
    /// Detects the style of this process's stdout.
    pub fn detect() -> Self {
        let tty = io::stdout().is_terminal();
        let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
        Style {
            tty,
            color: tty && !no_color,
        }
    }

    /// `text` in ANSI colour `code` (e.g. "31" red) when colour is allowed.
    pub fn paint(&self, code: &str, text: &str) -> String {
        if self.color {
            format!("\x1b[{code}m{text}\x1b[0m")
        } else {
            text.to_string()
        }
    }
}

/// Writes one line to stdout (errors, such as a closed pipe, are returned, never a panic).
///
/// # Errors
/// The write error.
pub fn line(text: &str) -> io::Result<()> {
    let mut o = io::stdout().lock();
    writeln!(o, "{text}")?;
    o.flush()
}

/// Writes `value` as one line of JSON (JSON Lines: one object per line,
/// no line breaks inside) to stdout. Every `--json` output goes through
/// here; the schema of each command is in docs/JSON.md.
///
/// # Errors
/// The write error.
pub fn json(value: &serde_json::Value) -> io::Result<()> {
    let mut o = io::stdout().lock();
    serde_json::to_writer(&mut o, value)?;
    writeln!(o)?;
    o.flush()
}

/// A duration in ms for people (`3 d 04:05:06`, `12.3 s`).
pub fn duration_ms(ms: u64) -> String {
    if ms < 60_000 {
        return format!("{:.1} s", ms as f64 / 1000.0);
    }
    let s = ms / 1000;
    let (d, h, m, s) = (s / 86_400, s / 3600 % 24, s / 60 % 60, s % 60);
    if d > 0 {
        format!("{d} d {h:02}:{m:02}:{s:02}")
    } else {
        format!("{h:02}:{m:02}:{s:02}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_read_well() {
        assert_eq!(duration_ms(12_345), "12.3 s");
        assert_eq!(duration_ms(3_723_000), "01:02:03");
        assert_eq!(duration_ms(90_061_000), "1 d 01:01:01");
    }

    #[test]
    fn paint_respects_color_flag() {
        let s = Style {
            tty: true,
            color: false,
        };
        assert_eq!(s.paint("31", "x"), "x");
        let s = Style {
            tty: true,
            color: true,
        };
        assert_eq!(s.paint("31", "x"), "\x1b[31mx\x1b[0m");
    }
}

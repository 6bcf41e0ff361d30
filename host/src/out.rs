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
    let mut value = value.clone();
    unwiden(&mut value);
    let mut o = io::stdout().lock();
    serde_json::to_writer(&mut o, &value)?;
    writeln!(o)?;
    o.flush()
}

/// `v` (an object) with `"type": kind` first: a line of a JSON Lines
/// stream (docs/JSON.md).
pub fn typed(kind: &str, v: serde_json::Value) -> serde_json::Value {
    let mut o = serde_json::Map::new();
    o.insert("type".into(), kind.into());
    if let serde_json::Value::Object(m) = v {
        o.extend(m);
    }
    serde_json::Value::Object(o)
}

/// Every number of `v` that is exactly an `f32` (a device value widened
/// to `f64`, which prints as `15.850000381469727`) replaced by the shortest
/// decimal that reads back as that `f32` (`15.85`): the same `f32`, without
/// the noise of widening. Integers and other numbers are left alone.
pub fn unwiden(v: &mut serde_json::Value) {
    match v {
        serde_json::Value::Number(n) if n.is_f64() => {
            if let Some(x) = n.as_f64() {
                let f = x as f32;
                if f64::from(f) == x && x.is_finite() {
                    if let Some(clean) = format!("{f}")
                        .parse::<f64>()
                        .ok()
                        .and_then(serde_json::Number::from_f64)
                    {
                        *n = clean;
                    }
                }
            }
        }
        serde_json::Value::Array(a) => a.iter_mut().for_each(unwiden),
        serde_json::Value::Object(o) => o.values_mut().for_each(unwiden),
        _ => {}
    }
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
    fn widened_f32_prints_without_noise() {
        let mut v =
            serde_json::json!({"m": f64::from(15.85_f32), "n": 3, "x": [0.1, f64::from(0.25_f32)]});
        assert_eq!(
            v["m"].to_string(),
            "15.850000381469727",
            "the noise it removes"
        );
        unwiden(&mut v);
        assert_eq!(v.to_string(), r#"{"m":15.85,"n":3,"x":[0.1,0.25]}"#);
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

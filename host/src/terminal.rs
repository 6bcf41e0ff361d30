//! The person at a terminal, as a `fringe_device::guide::Guide`:
//! instructions and questions on stderr, answers from stdin.

use std::io::{BufRead, Write as _};

use fringe_device::guide::{Cancelled, Guide};

/// A person at a terminal.
#[derive(Debug, Default)]
pub struct Terminal;

fn read_line() -> Result<String, Cancelled> {
    let mut s = String::new();
    match std::io::stdin().lock().read_line(&mut s) {
        Ok(0) => Err(Cancelled("no more input".into())),
        Ok(_) => Ok(s),
        Err(e) => Err(Cancelled(e.to_string())),
    }
}

impl Guide for Terminal {
    fn step(&mut self, instruction: &str) -> Result<(), Cancelled> {
        eprint!("{instruction}\n  press Enter when done (Ctrl-C to stop) ");
        read_line().map(|_| ())
    }
    fn ask(&mut self, question: &str) -> Result<Option<String>, Cancelled> {
        eprint!("{question} ");
        let _ = std::io::stderr().flush();
        let s = read_line()?;
        let t = s.trim();
        Ok((!t.is_empty()).then(|| t.to_string()))
    }
    fn confirm(&mut self, question: &str) -> Result<bool, Cancelled> {
        Ok(matches!(
            self.ask(&format!("{question} [y/N]"))?.as_deref(),
            Some("y" | "Y" | "yes")
        ))
    }
    fn show(&mut self, text: &str) {
        eprintln!("{text}");
    }
    fn caution(&mut self, text: &str) {
        eprintln!("{text}");
    }
}

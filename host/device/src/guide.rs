//! How a guided procedure talks to the person at the device (or to a
//! simulated world): instructions, questions, confirmations and what it
//! shows before a change. The binary's terminal and the demo implement it.

/// The person stopped the procedure (or there is no more input).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("stopped: {0}")]
pub struct Cancelled(pub String);

/// How a guided procedure talks to the person.
pub trait Guide {
    /// Shows an instruction and waits until the person has done it.
    ///
    /// # Errors
    /// [`Cancelled`].
    fn step(&mut self, instruction: &str) -> Result<(), Cancelled>;
    /// Asks a question; `None` for an empty answer.
    ///
    /// # Errors
    /// [`Cancelled`].
    fn ask(&mut self, question: &str) -> Result<Option<String>, Cancelled>;
    /// Asks for a yes/no confirmation.
    ///
    /// # Errors
    /// [`Cancelled`].
    fn confirm(&mut self, question: &str) -> Result<bool, Cancelled>;
    /// Shows what a step measured, or what a change will change.
    fn show(&mut self, text: &str);
    /// Shows a safety caution (before every change to a device).
    fn caution(&mut self, text: &str);
}

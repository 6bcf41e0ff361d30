//! A change sent to the device whose answer did not come: it may have
//! landed.
//!
//! The link repeats a signed write whose answer is lost and, where the
//! repeat is refused as a replay, asks the device whether the first try
//! landed ([`Link::request_signed`]). When every try goes unanswered (the
//! cable pulled, the device restarting, a long disturbance) the device may
//! hold the change or not. Returning the link's error there left a change
//! the device runs with no audit record of who made it and why. So each
//! write of this crate asks the device, before it gives up, for the
//! counter of the last signed write it accepted (the device keeps it
//! against replays; `Status::write_counter`): the counter this write was
//! signed with means it landed ([`Link::request_signed_counted`]), and the change is recorded as usual
//! with its record saying the answer was lost; the same counter means it
//! did not (nothing changed); where the device still does not answer,
//! [`Unconfirmed`] says that the outcome is not known and what to do.
//! (What the device holds cannot tell: a switch to the active product, or
//! a push of the content a slot already holds, reads back the same whether
//! or not the write ran.)

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::Request;

/// How a write landed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Landed {
    /// The device answered it.
    Answered,
    /// Its answer was lost (the link's error, in words), and the device's
    /// write counter shows it took it.
    AnswerLost(String),
}

impl Landed {
    /// Words for the audit record's verification, after what was read back
    /// (empty for an answered write).
    pub fn words(&self) -> String {
        match self {
            Landed::Answered => String::new(),
            Landed::AnswerLost(e) => format!(
                " (the device's answer to the write was lost: {e}; its write counter shows it took it)"
            ),
        }
    }
}

/// A write whose outcome is not known: the device answered neither the
/// write nor the question after it. Nothing was recorded.
#[derive(Debug, thiserror::Error)]
#[error("the device answered neither the {what} nor the question after it ({source}): whether it took the change is not known, and nothing was recorded. When it answers, {then}")]
pub struct Unconfirmed {
    /// What was written, in words.
    pub what: &'static str,
    /// What to do once the device answers.
    pub then: &'static str,
    /// The link's error on the write.
    #[source]
    pub source: LinkError,
}

/// A write the device did not take: no answer came, and its write counter
/// is unchanged. Nothing changed, nothing was recorded.
#[derive(Debug, thiserror::Error)]
#[error("the device did not answer the {what} ({source}) and did not take it (its write counter is unchanged): nothing changed on the device, and nothing was recorded")]
pub struct NotTaken {
    /// What was written, in words.
    pub what: &'static str,
    /// The link's error on the write.
    #[source]
    pub source: LinkError,
}

/// Why a checked write failed.
#[derive(Debug)]
pub enum WriteFailed {
    /// The device refused it, or nothing was sent: the link's error.
    Link(LinkError),
    /// No answer came, and the device did not take it.
    NotTaken(NotTaken),
    /// Not known whether it landed.
    Unconfirmed(Unconfirmed),
}

/// Words of a checked write for its errors.
#[derive(Debug, Clone, Copy)]
pub struct Checked {
    /// What is written, in words ("product calibration write").
    pub what: &'static str,
    /// What to do once the device answers again, where the outcome is not
    /// known.
    pub then: &'static str,
}

/// Sends `request` signed with `key`; where no answer comes (any failure
/// but the device's refusal), asks the device for its write counter to
/// learn whether it took the write.
///
/// # Errors
/// [`WriteFailed`].
pub fn write_checked(
    link: &mut Link,
    key: &Key,
    request: Request,
    words: Checked,
) -> Result<Landed, WriteFailed> {
    let (sent, counter) = link.request_signed_counted(request, key);
    match (sent, counter) {
        (Ok(_), _) => Ok(Landed::Answered),
        // Refused, or not sent at all.
        (Err(e @ LinkError::Refused { .. }), _) | (Err(e), None) => Err(WriteFailed::Link(e)),
        (Err(e), Some(counter)) => match link.status() {
            Ok(s) if s.write_counter == counter => Ok(Landed::AnswerLost(e.to_string())),
            Ok(_) => Err(WriteFailed::NotTaken(NotTaken {
                what: words.what,
                source: e,
            })),
            Err(_) => Err(WriteFailed::Unconfirmed(Unconfirmed {
                what: words.what,
                then: words.then,
                source: e,
            })),
        },
    }
}

/// A lossy line to the in-process simulated device, for the tests of the
/// writes of this crate.
#[cfg(test)]
pub(crate) mod lossy {
    use std::sync::{Arc, Mutex};
    use std::time::Duration;

    use fringe_link::{Link, LinkError, LinkOptions, Opener, Port};
    use fringe_protocol::auth::Key;
    use fringe_protocol::frame::FrameDecoder;
    use fringe_protocol::HostFrame;

    /// Which of the device's answers the line loses.
    #[derive(Debug, Clone, Copy, PartialEq)]
    pub(crate) enum Loses {
        Nothing,
        /// The answers to every signed write (the device takes the write).
        Writes,
        /// Everything from the first signed write on (the cable pulled).
        AfterAWrite,
        /// The signed writes themselves: the device never sees them.
        WriteFrames,
    }

    /// A port to the in-process simulated device that loses answers.
    struct LossyPort {
        inner: Box<dyn Port>,
        loses: Arc<Mutex<Loses>>,
        deaf: bool,
        frames: FrameDecoder<HostFrame>,
    }

    impl Port for LossyPort {
        fn read_some(&mut self, buf: &mut [u8], timeout: Duration) -> std::io::Result<usize> {
            let n = self.inner.read_some(buf, timeout)?;
            Ok(if self.deaf { 0 } else { n })
        }
        fn write_all(&mut self, bytes: &[u8]) -> std::io::Result<()> {
            let loses = *self.loses.lock().unwrap_or_else(|p| p.into_inner());
            let mut forward = true;
            for b in bytes {
                if let Some(Ok(f)) = self.frames.feed(*b) {
                    let write = f.auth.is_some();
                    self.deaf = match loses {
                        Loses::Nothing => false,
                        Loses::Writes | Loses::WriteFrames => write,
                        Loses::AfterAWrite => self.deaf || write,
                    };
                    forward &= !(write && loses == Loses::WriteFrames);
                }
            }
            if forward {
                self.inner.write_all(bytes)
            } else {
                Ok(())
            }
        }
        fn discard_input(&mut self) -> std::io::Result<()> {
            self.inner.discard_input()
        }
    }

    struct LossyOpener(Box<dyn Opener>, Arc<Mutex<Loses>>);

    impl Opener for LossyOpener {
        fn open(&mut self) -> Result<Box<dyn Port>, LinkError> {
            Ok(Box::new(LossyPort {
                inner: self.0.open()?,
                loses: self.1.clone(),
                deaf: false,
                frames: FrameDecoder::default(),
            }))
        }
        fn name(&self) -> &str {
            self.0.name()
        }
        fn baud(&self) -> u32 {
            self.0.baud()
        }
    }

    /// A SQLite store in `dir` that knows HGM-L2-0099.
    pub(crate) fn store_in(dir: &std::path::Path) -> fringe_sqlite::Store {
        let mut store = fringe_sqlite::Store::open(dir.join("a.db")).expect("store");
        store
            .ensure_device(&fringe_store::DeviceInfo {
                serial: "HGM-L2-0099".into(),
                ..Default::default()
            })
            .expect("device");
        store
    }

    /// A simulated device HGM-L2-0099 with `key` (the firmware core, in
    /// this process) behind a line whose losses the handle sets.
    pub(crate) fn lossy_sim(key: Key) -> (Link, Arc<Mutex<Loses>>) {
        let sim = fringe_sim::port::SimHandle::boot(
            3,
            fringe_firmware::Scenario::default(),
            fringe_firmware::DeviceConfig::new("HGM-L2-0099", key),
        )
        .expect("boot");
        let loses = Arc::new(Mutex::new(Loses::Nothing));
        let opts = LinkOptions {
            timeout: Duration::from_millis(300),
            tries: 2,
            backoff_min: Duration::from_millis(5),
            backoff_max: Duration::from_millis(20),
            handshakes: 1,
        };
        let link = Link::connect(
            Box::new(LossyOpener(sim.opener("sim"), loses.clone())),
            opts,
        )
        .expect("handshake");
        (link, loses)
    }
}

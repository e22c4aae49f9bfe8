//! Stopping a long run cleanly on Ctrl-C (SIGINT) or SIGTERM.
//!
//! The first signal only raises a flag: `answer` and `vet` check it each time an answer has been
//! saved to the journal (and between the stages of `vet`) and then stop with
//! [`Error::Interrupted`], so everything finished is kept and the same command continues the
//! run. Decoding cannot be cut mid-step, so a notice says that the answers in progress are
//! being finished. A second signal ends the process at once (exit 128 + signal); the journal
//! stays valid then too, because a line cut mid-write is dropped when it is read back.

use crate::error::{Error, Result};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, OnceLock};

/// The signals that stop a run.
const STOP_SIGNALS: [i32; 2] = [signal_hook::consts::SIGINT, signal_hook::consts::SIGTERM];

/// Whether a stop signal has arrived, and which.
#[derive(Debug, Clone)]
pub struct StopFlag {
    /// 0: none yet; else the signal number of the last stop signal.
    which: Arc<AtomicUsize>,
}

impl StopFlag {
    /// A flag no signal ever raises (library callers that handle signals themselves, tests).
    pub fn never() -> Self {
        StopFlag {
            which: Arc::new(AtomicUsize::new(0)),
        }
    }

    /// Installs the handlers once per process and returns the process-wide flag.
    pub fn install() -> Result<Self> {
        static FLAG: OnceLock<std::result::Result<StopFlag, String>> = OnceLock::new();
        FLAG.get_or_init(|| register().map_err(|e| e.to_string()))
            .clone()
            .map_err(|e| Error::internal(format!("cannot install the Ctrl-C handler: {e}")))
    }

    /// The stop signal received, if any.
    pub fn signal(&self) -> Option<i32> {
        match self.which.load(Ordering::SeqCst) {
            0 => None,
            n => Some(n as i32),
        }
    }

    /// `Err(Interrupted)` with `saved()` as the account of what was kept, once a signal came.
    pub fn check(&self, saved: impl FnOnce() -> String) -> Result<()> {
        match self.signal() {
            None => Ok(()),
            Some(signal) => Err(Error::Interrupted {
                signal,
                saved: saved(),
            }),
        }
    }

    /// Raises the flag as a signal would (tests).
    pub fn raise_for_test(&self, signal: i32) {
        self.which.store(signal as usize, Ordering::SeqCst);
    }
}

fn register() -> std::io::Result<StopFlag> {
    use signal_hook::flag;
    let seen = Arc::new(AtomicBool::new(false));
    let which = Arc::new(AtomicUsize::new(0));
    for sig in STOP_SIGNALS {
        // Registered first, so it sees `seen` as it was before this signal: only a second
        // signal exits at once.
        flag::register_conditional_shutdown(sig, 128 + sig, Arc::clone(&seen))?;
        flag::register(sig, Arc::clone(&seen))?;
        flag::register_usize(sig, Arc::clone(&which), sig as usize)?;
    }
    notice_thread()?;
    Ok(StopFlag { which })
}

/// Prints, from a thread of its own (a signal handler may not), what happens after the first
/// signal.
#[cfg(unix)]
fn notice_thread() -> std::io::Result<()> {
    let mut signals = signal_hook::iterator::Signals::new(STOP_SIGNALS)?;
    std::thread::Builder::new()
        .name("liftgate-signals".into())
        .spawn(move || {
            if let Some(sig) = signals.forever().next() {
                eprintln!(
                    "\nliftgate: {} received: stopping once the answers in progress are saved; press Ctrl-C again to stop at once (saved answers are kept either way)",
                    crate::error::signal_name(sig)
                );
            }
        })?;
    Ok(())
}

#[cfg(not(unix))]
fn notice_thread() -> std::io::Result<()> {
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_raised_flag_becomes_an_interrupted_error_with_the_shell_exit_code() {
        let flag = StopFlag::never();
        assert!(flag.check(|| unreachable!()).is_ok());
        flag.raise_for_test(2);
        let err = flag.check(|| "3 answers kept".into()).unwrap_err();
        assert_eq!(err.exit_code(), 130);
        assert!(err.to_string().contains("3 answers kept"), "{err}");
        flag.raise_for_test(15);
        assert_eq!(flag.check(String::new).unwrap_err().exit_code(), 143);
    }
}

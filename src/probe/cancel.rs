//! A flag long work checks between steps, set when whoever asked for it has
//! gone: a request that timed out or whose client hung up stops using a core.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

/// Shared by the one who asks (who cancels) and the work (which checks).
#[derive(Debug, Clone, Default)]
pub struct Cancel(Arc<AtomicBool>);

impl Cancel {
    /// Asks the work to stop at its next check.
    pub fn cancel(&self) {
        self.0.store(true, Ordering::Relaxed);
    }

    /// Whether the work should stop.
    pub fn is_cancelled(&self) -> bool {
        self.0.load(Ordering::Relaxed)
    }

    /// A guard that cancels when dropped: held by a request handler, it
    /// cancels the work the handler started when the handler's future is
    /// dropped (a timeout, a client gone) as well as when it returns.
    pub fn on_drop(&self) -> CancelOnDrop {
        CancelOnDrop(self.clone())
    }
}

/// Two options are equal whatever their flags: the flag is not a setting.
impl PartialEq for Cancel {
    fn eq(&self, _: &Cancel) -> bool {
        true
    }
}

impl Eq for Cancel {}

/// See [`Cancel::on_drop`].
#[derive(Debug)]
pub struct CancelOnDrop(Cancel);

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.0.cancel();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_dropped_guard_cancels_every_clone() {
        let cancel = Cancel::default();
        let seen_by_work = cancel.clone();
        let guard = cancel.on_drop();
        assert!(!seen_by_work.is_cancelled());
        drop(guard);
        assert!(seen_by_work.is_cancelled());
    }
}

//! The server-wide budget of memory for image decodes in flight.
//!
//! Each image is held to `--max-decoded-bytes`, but many small files that
//! each decode to a large image could still, together, take more memory than
//! the machine has. Before decoding, a request reserves what its image will
//! take (read from the header); when the budget is spent it waits briefly for
//! other decodes to finish, then is answered 503 so the client retries later.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{OwnedSemaphorePermit, Semaphore};

/// Default budget: 1 GiB of decoded images in flight, room for several images
/// at `--max-decoded-bytes` and thousands of camera frames.
pub const DEFAULT_DECODE_BUDGET_BYTES: u64 = 1 << 30;

/// How long a decode waits for room before it is refused.
pub const DECODE_BUDGET_WAIT: Duration = Duration::from_secs(2);

/// The budget counts in KiB so a `u32` of permits covers terabytes.
const UNIT: u64 = 1024;

/// The budget was spent for longer than the wait.
#[derive(Debug, Clone, thiserror::Error)]
#[error("images being decoded already take the server's decode budget of {budget} bytes (--decode-budget-bytes); retry shortly")]
pub struct BudgetSpent {
    pub budget: u64,
}

/// Shared budget; clones share it.
#[derive(Debug, Clone)]
pub struct DecodeBudget {
    permits: Arc<Semaphore>,
    units: u32,
    wait: Duration,
}

/// A reservation, given back when dropped.
#[derive(Debug)]
pub struct Reserved(#[allow(dead_code)] OwnedSemaphorePermit);

impl DecodeBudget {
    /// A budget of `bytes`, waiting at most `wait` for room.
    pub fn new(bytes: u64, wait: Duration) -> DecodeBudget {
        let units = (bytes / UNIT).clamp(1, u64::from(u32::MAX >> 3)) as u32;
        DecodeBudget {
            permits: Arc::new(Semaphore::new(units as usize)),
            units,
            wait,
        }
    }

    /// The budget in bytes.
    pub fn bytes(&self) -> u64 {
        u64::from(self.units) * UNIT
    }

    /// Reserves room for `bytes` of decoding. A request larger than the whole
    /// budget takes all of it (the per-image limit is what refuses it).
    pub async fn reserve(&self, bytes: u64) -> Result<Reserved, BudgetSpent> {
        let wanted = bytes.div_ceil(UNIT).clamp(1, u64::from(self.units)) as u32;
        let permits = Arc::clone(&self.permits);
        match tokio::time::timeout(self.wait, permits.acquire_many_owned(wanted)).await {
            Ok(Ok(permit)) => Ok(Reserved(permit)),
            _ => Err(BudgetSpent {
                budget: self.bytes(),
            }),
        }
    }
}

/// Bytes a decode of an image of this header takes at its peak: the decoded
/// buffer and the RGB copy made from it.
pub fn peak_bytes(width: u32, height: u32, decoded_bytes: u64) -> u64 {
    decoded_bytes.saturating_add(u64::from(width) * u64::from(height) * 3)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn waits_then_refuses_when_spent_and_frees_on_drop() {
        let budget = DecodeBudget::new(10 * UNIT, Duration::from_millis(20));
        let first = budget.reserve(6 * UNIT).await.unwrap();
        // 6 + 5 KiB > 10 KiB: no room until the first is dropped.
        let refused = budget.reserve(5 * UNIT).await.unwrap_err();
        assert_eq!(refused.budget, 10 * UNIT);
        assert!(refused.to_string().contains("--decode-budget-bytes"));
        let second = budget.reserve(4 * UNIT).await.unwrap();
        drop(first);
        let third = budget.reserve(6 * UNIT).await.unwrap();
        drop((second, third));
        // Larger than the whole budget: takes all of it rather than never fitting.
        let all = budget.reserve(100 * UNIT).await.unwrap();
        assert!(budget.reserve(1).await.is_err());
        drop(all);
        assert!(budget.reserve(1).await.is_ok());
    }

    #[tokio::test]
    async fn a_waiting_decode_gets_room_when_one_finishes() {
        let budget = DecodeBudget::new(8 * UNIT, Duration::from_secs(5));
        let held = budget.reserve(8 * UNIT).await.unwrap();
        let waiter = {
            let budget = budget.clone();
            tokio::spawn(async move { budget.reserve(3 * UNIT).await.is_ok() })
        };
        tokio::task::yield_now().await;
        drop(held);
        assert!(waiter.await.unwrap());
    }

    #[test]
    fn peak_counts_the_decoded_buffer_and_the_rgb_copy() {
        // 16-bit RGB 100 x 10: 6,000 decoded bytes plus 3,000 of 8-bit RGB.
        assert_eq!(peak_bytes(100, 10, 6_000), 9_000);
    }
}

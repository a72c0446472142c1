//! The server's clock: the system clock, or a test clock that moves only when told, so
//! scheduler tests run a year of fires without sleeping. Times are Unix milliseconds.

use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::watch;

/// A future a clock hands out.
pub type Sleep<'a> = Pin<Box<dyn Future<Output = ()> + Send + 'a>>;

pub trait Clock: Send + Sync {
    /// Now, in Unix milliseconds.
    fn now_ms(&self) -> i64;
    /// Resolves no earlier than `at` (the system clock may also resolve sooner, after at most
    /// a minute, so that a changed wall clock is noticed; callers look at `now_ms` again).
    fn sleep_until(&self, at: i64) -> Sleep<'_>;
}

/// The system clock.
pub struct SystemClock;

impl Clock for SystemClock {
    fn now_ms(&self) -> i64 {
        chrono::Utc::now().timestamp_millis()
    }

    fn sleep_until(&self, at: i64) -> Sleep<'_> {
        let wait = (at - self.now_ms()).clamp(0, 60_000) as u64;
        Box::pin(tokio::time::sleep(Duration::from_millis(wait)))
    }
}

/// A clock that stands still until [`TestClock::set`] or [`TestClock::advance`] moves it.
pub struct TestClock {
    now: watch::Sender<i64>,
}

impl TestClock {
    pub fn new(start_ms: i64) -> Arc<TestClock> {
        Arc::new(TestClock { now: watch::channel(start_ms).0 })
    }

    /// Moves the clock to `ms` (never backwards) and wakes the sleepers it passes.
    pub fn set(&self, ms: i64) {
        self.now.send_modify(|t| *t = (*t).max(ms));
    }

    pub fn advance(&self, ms: i64) {
        self.now.send_modify(|t| *t += ms.max(0));
    }
}

impl Clock for TestClock {
    fn now_ms(&self) -> i64 {
        *self.now.borrow()
    }

    fn sleep_until(&self, at: i64) -> Sleep<'_> {
        let mut rx = self.now.subscribe();
        Box::pin(async move {
            // Only fails when the sender is gone, and the sender lives as long as `self`.
            let _ = rx.wait_for(|t| *t >= at).await;
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_test_clock_wakes_sleepers_when_it_passes_their_time() {
        let clock = TestClock::new(1_000);
        let sleeping = clock.sleep_until(5_000);
        tokio::pin!(sleeping);
        assert!(tokio::time::timeout(Duration::from_millis(20), &mut sleeping).await.is_err(), "woke before the clock moved");
        clock.advance(3_000);
        assert!(tokio::time::timeout(Duration::from_millis(20), &mut sleeping).await.is_err(), "woke at 4000 for 5000");
        clock.set(5_000);
        tokio::time::timeout(Duration::from_secs(5), &mut sleeping).await.expect("woke at 5000");
        clock.set(10);
        assert_eq!(clock.now_ms(), 5_000, "the clock never goes back");
    }
}

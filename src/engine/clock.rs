//! The clock, injected so tests control time (quotas, deadlines).

use std::sync::Mutex;

use chrono::{DateTime, Utc};

/// A source of the current time.
pub trait Clock: Send + Sync {
    /// Now, in UTC.
    fn now(&self) -> DateTime<Utc>;
}

/// The system clock.
#[derive(Debug, Default, Clone, Copy)]
pub struct SystemClock;

impl Clock for SystemClock {
    fn now(&self) -> DateTime<Utc> {
        Utc::now()
    }
}

/// A clock that stays where a test puts it.
#[derive(Debug)]
pub struct FixedClock(Mutex<DateTime<Utc>>);

impl FixedClock {
    /// A clock stopped at `t`.
    pub fn new(t: DateTime<Utc>) -> FixedClock {
        FixedClock(Mutex::new(t))
    }

    /// Moves the clock to `t`.
    pub fn set(&self, t: DateTime<Utc>) {
        *self.0.lock().expect("clock lock") = t;
    }
}

impl Clock for FixedClock {
    fn now(&self) -> DateTime<Utc> {
        *self.0.lock().expect("clock lock")
    }
}

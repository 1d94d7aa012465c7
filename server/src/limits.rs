//! Request rate limits and the processing backlog bound.
//!
//! [`RateLimiter`] is a token bucket per key (a meter token, a client
//! address): it holds up to `per_minute` requests and refills at
//! `per_minute / 60` per second, so a client may send a burst of a minute's
//! allowance and then keeps the steady rate. A refused request learns how long
//! until the next one is allowed (HTTP `Retry-After`). Counts live in memory;
//! a restart clears them. Time is passed in, so the rules are testable without
//! waiting.
//!
//! [`Backlog`] remembers how many epochs wait for processing, refreshed from
//! the database at most once a second and counted up by each accepted upload
//! in between, so that a burst of uploads cannot slip past the bound between
//! two refreshes.

use std::collections::HashMap;
use std::hash::Hash;
use std::net::IpAddr;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Most keys tracked before full buckets are forgotten.
const SWEEP_ABOVE: usize = 10_000;

#[derive(Debug, Clone, Copy)]
struct Bucket {
    tokens: f64,
    at: Instant,
}

/// Token buckets of `per_minute` requests per key.
#[derive(Debug)]
pub struct RateLimiter<K> {
    per_minute: u32,
    buckets: Mutex<HashMap<K, Bucket>>,
}

impl<K: Hash + Eq> RateLimiter<K> {
    /// A limiter of `per_minute` requests per key; 0 allows everything.
    pub fn new(per_minute: u32) -> Self {
        Self { per_minute, buckets: Mutex::default() }
    }

    /// Takes one request for `key` at `now`, or says how long until one is
    /// allowed.
    pub fn take(&self, key: K, now: Instant) -> Result<(), Duration> {
        if self.per_minute == 0 {
            return Ok(());
        }
        let capacity = f64::from(self.per_minute);
        let rate = capacity / 60.0;
        let mut buckets = self.buckets.lock().unwrap_or_else(|e| e.into_inner());
        if buckets.len() > SWEEP_ABOVE {
            // A bucket idle long enough to be full again is the same as none.
            let full_after = Duration::from_secs(60);
            buckets.retain(|_, b| now.saturating_duration_since(b.at) < full_after);
        }
        let b = buckets.entry(key).or_insert(Bucket { tokens: capacity, at: now });
        let elapsed = now.saturating_duration_since(b.at).as_secs_f64();
        b.tokens = (b.tokens + elapsed * rate).min(capacity);
        b.at = now;
        if b.tokens >= 1.0 {
            b.tokens -= 1.0;
            Ok(())
        } else {
            Err(Duration::from_secs_f64((1.0 - b.tokens) / rate))
        }
    }
}

/// Seconds to put in `Retry-After` for a wait: rounded up, at least 1.
pub fn retry_after_s(wait: Duration) -> u64 {
    let s = wait.as_secs() + u64::from(wait.subsec_nanos() > 0);
    s.max(1)
}

/// The count of epochs waiting for processing, as last seen.
#[derive(Debug, Default)]
pub struct Backlog {
    seen: Mutex<Option<(Instant, u64)>>,
}

/// How long a counted backlog is trusted before it is counted again.
const BACKLOG_FRESH: Duration = Duration::from_secs(1);

impl Backlog {
    /// The remembered count if it is fresh at `now`.
    pub fn fresh(&self, now: Instant) -> Option<u64> {
        let seen = self.seen.lock().unwrap_or_else(|e| e.into_inner());
        seen.filter(|(at, _)| now.saturating_duration_since(*at) < BACKLOG_FRESH).map(|(_, n)| n)
    }

    /// Remembers a count made at `now`.
    pub fn counted(&self, n: u64, now: Instant) {
        *self.seen.lock().unwrap_or_else(|e| e.into_inner()) = Some((now, n));
    }

    /// One more epoch was accepted.
    pub fn add_one(&self) {
        if let Some((_, n)) = self.seen.lock().unwrap_or_else(|e| e.into_inner()).as_mut() {
            *n += 1;
        }
    }
}

/// The limiters of one process.
#[derive(Debug)]
pub struct Limiters {
    /// Uploads per meter token (by token id).
    pub uploads_by_token: RateLimiter<i64>,
    /// Uploads per client address.
    pub uploads_by_ip: RateLimiter<IpAddr>,
    /// Sign-in attempts per client address.
    pub sign_ins_by_ip: RateLimiter<IpAddr>,
    /// Epochs waiting for processing.
    pub backlog: Backlog,
}

impl Limiters {
    /// Limiters with the configured rates.
    pub fn new(c: &crate::config::LimitsConfig) -> Self {
        Self {
            uploads_by_token: RateLimiter::new(c.uploads_per_minute_per_token),
            uploads_by_ip: RateLimiter::new(c.uploads_per_minute_per_ip),
            sign_ins_by_ip: RateLimiter::new(c.sign_ins_per_minute_per_ip),
            backlog: Backlog::default(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bucket_allows_a_minutes_burst_then_the_steady_rate() {
        let l = RateLimiter::new(6);
        let t0 = Instant::now();
        for _ in 0..6 {
            assert_eq!(l.take("a", t0), Ok(()));
        }
        // Empty: the next token comes after 60 / 6 = 10 s.
        assert_eq!(l.take("a", t0), Err(Duration::from_secs(10)));
        assert_eq!(l.take("b", t0), Ok(()), "keys are independent");
        let wait = l.take("a", t0 + Duration::from_secs(4)).unwrap_err();
        assert!((wait.as_secs_f64() - 6.0).abs() < 1e-9, "{wait:?}");
        assert_eq!(l.take("a", t0 + Duration::from_secs(10)), Ok(()));
        assert!(l.take("a", t0 + Duration::from_secs(11)).is_err());
        // Idle for long: full again, never above the capacity.
        for _ in 0..6 {
            assert_eq!(l.take("a", t0 + Duration::from_secs(3600)), Ok(()));
        }
        assert!(l.take("a", t0 + Duration::from_secs(3600)).is_err());
    }

    #[test]
    fn zero_means_no_limit_and_waits_round_up() {
        let l = RateLimiter::new(0);
        let t0 = Instant::now();
        assert!((0..10_000).all(|_| l.take(1, t0).is_ok()));
        assert_eq!(retry_after_s(Duration::from_millis(1)), 1);
        assert_eq!(retry_after_s(Duration::ZERO), 1);
        assert_eq!(retry_after_s(Duration::from_secs(10)), 10);
        assert_eq!(retry_after_s(Duration::from_millis(10_001)), 11);
    }

    #[test]
    fn the_backlog_is_trusted_for_a_second_and_counts_accepted_uploads() {
        let b = Backlog::default();
        let t0 = Instant::now();
        assert_eq!(b.fresh(t0), None);
        b.add_one();
        assert_eq!(b.fresh(t0), None, "nothing counted yet");
        b.counted(4, t0);
        b.add_one();
        assert_eq!(b.fresh(t0 + Duration::from_millis(500)), Some(5));
        assert_eq!(b.fresh(t0 + Duration::from_secs(1)), None);
    }
}

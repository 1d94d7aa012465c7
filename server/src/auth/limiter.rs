//! Limits on failed sign-ins, per account and per client address: after
//! `max_failures` failures within a fixed window that began at the first
//! failure, further attempts are refused until the window ends; a successful
//! sign-in clears the account's count. Counts live in memory (a restart clears
//! them). Time is passed in, so the rules are testable without waiting.

use std::collections::HashMap;
use std::net::IpAddr;
use std::sync::Mutex;
use std::time::{Duration, Instant};

use thiserror::Error;

/// Most tracked keys per kind before expired windows are swept.
const SWEEP_ABOVE: usize = 10_000;

/// Limit settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SignInLimits {
    /// Failures per account within a window before refusing.
    pub per_account: u32,
    /// Failures per client address within a window before refusing.
    pub per_ip: u32,
    /// Window length.
    pub window: Duration,
}

/// A refused attempt.
#[derive(Debug, Error, PartialEq, Eq)]
pub enum LimitError {
    /// The account had too many failures.
    #[error("too many failed sign-ins for this account; try again in {} s", retry_after.as_secs().max(1))]
    Account {
        /// Time until the window ends.
        retry_after: Duration,
    },
    /// The client address had too many failures.
    #[error("too many failed sign-ins from this address; try again in {} s", retry_after.as_secs().max(1))]
    Address {
        /// Time until the window ends.
        retry_after: Duration,
    },
}

impl LimitError {
    /// Time until another attempt is allowed.
    pub fn retry_after(&self) -> Duration {
        match self {
            LimitError::Account { retry_after } | LimitError::Address { retry_after } => {
                *retry_after
            }
        }
    }
}

#[derive(Debug, Clone, Copy)]
struct Window {
    start: Instant,
    failures: u32,
}

#[derive(Debug, Default)]
struct Counts {
    accounts: HashMap<String, Window>,
    addresses: HashMap<IpAddr, Window>,
}

/// Failed sign-in counter shared by all requests.
#[derive(Debug)]
pub struct SignInLimiter {
    limits: SignInLimits,
    counts: Mutex<Counts>,
}

fn blocked(w: Option<&Window>, max: u32, window: Duration, now: Instant) -> Option<Duration> {
    let w = w?;
    let end = w.start + window;
    (w.failures >= max && now < end).then(|| end - now)
}

fn bump<K: std::hash::Hash + Eq>(
    map: &mut HashMap<K, Window>,
    key: K,
    window: Duration,
    now: Instant,
) {
    if map.len() > SWEEP_ABOVE {
        map.retain(|_, w| now < w.start + window);
    }
    let w = map.entry(key).or_insert(Window { start: now, failures: 0 });
    if now >= w.start + window {
        *w = Window { start: now, failures: 0 };
    }
    w.failures += 1;
}

impl SignInLimiter {
    /// A limiter with no failures recorded.
    pub fn new(limits: SignInLimits) -> Self {
        Self { limits, counts: Mutex::default() }
    }

    fn counts(&self) -> std::sync::MutexGuard<'_, Counts> {
        self.counts.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Whether an attempt for `account` from `ip` may proceed at `now`.
    pub fn check(&self, account: &str, ip: IpAddr, now: Instant) -> Result<(), LimitError> {
        let c = self.counts();
        let l = self.limits;
        if let Some(retry_after) = blocked(c.addresses.get(&ip), l.per_ip, l.window, now) {
            return Err(LimitError::Address { retry_after });
        }
        if let Some(retry_after) = blocked(c.accounts.get(account), l.per_account, l.window, now) {
            return Err(LimitError::Account { retry_after });
        }
        Ok(())
    }

    /// Records a failed attempt.
    pub fn failed(&self, account: &str, ip: IpAddr, now: Instant) {
        let mut c = self.counts();
        let w = self.limits.window;
        bump(&mut c.accounts, account.to_string(), w, now);
        bump(&mut c.addresses, ip, w, now);
    }

    /// Records a successful sign-in: the account's failures are forgotten (the
    /// address's are kept).
    pub fn succeeded(&self, account: &str) {
        self.counts().accounts.remove(account);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limiter() -> SignInLimiter {
        SignInLimiter::new(SignInLimits {
            per_account: 3,
            per_ip: 5,
            window: Duration::from_secs(900),
        })
    }

    #[test]
    fn an_account_is_locked_after_its_failures_until_the_window_ends() {
        let l = limiter();
        let t0 = Instant::now();
        let ip: IpAddr = "192.0.2.1".parse().unwrap();
        for i in 0..3 {
            assert_eq!(l.check("a@x", ip, t0 + Duration::from_secs(i)), Ok(()));
            l.failed("a@x", ip, t0 + Duration::from_secs(i));
        }
        let e = l.check("a@x", ip, t0 + Duration::from_secs(10)).unwrap_err();
        assert_eq!(e, LimitError::Account { retry_after: Duration::from_secs(890) });
        // Another account from the same address is not locked (3 < 5 failures).
        assert_eq!(l.check("b@x", ip, t0 + Duration::from_secs(10)), Ok(()));
        // At the end of the window the account may try again, and a new window starts.
        assert_eq!(l.check("a@x", ip, t0 + Duration::from_secs(900)), Ok(()));
        l.failed("a@x", ip, t0 + Duration::from_secs(900));
        assert_eq!(l.check("a@x", ip, t0 + Duration::from_secs(901)), Ok(()));
    }

    #[test]
    fn an_address_is_locked_across_accounts_and_success_clears_only_the_account() {
        let l = limiter();
        let t0 = Instant::now();
        let ip: IpAddr = "2001:db8::7".parse().unwrap();
        let other: IpAddr = "192.0.2.9".parse().unwrap();
        for i in 0..5 {
            l.failed(&format!("user{i}@x"), ip, t0);
        }
        assert!(matches!(l.check("new@x", ip, t0), Err(LimitError::Address { .. })));
        assert_eq!(l.check("new@x", other, t0), Ok(()));

        for _ in 0..3 {
            l.failed("c@x", other, t0);
        }
        assert!(l.check("c@x", other, t0).is_err());
        l.succeeded("c@x");
        assert_eq!(l.check("c@x", other, t0), Ok(()));
    }
}

//! Per-caller rate limits: a token bucket per token id (never per token text), and per peer
//! address for anonymous reads when `public_read` is set.
//!
//! A bucket holds at most `burst` requests and refills at `requests_per_second`; a request takes one
//! from its bucket, and a request that finds the bucket empty is answered 429 with `Retry-After`
//! (whole seconds until one request's worth has refilled, at least 1; RFC 9110 §10.2.3 gives
//! `Retry-After` in seconds). A refused request takes nothing, so a client that waits as told gets
//! through. This is the classic token bucket (common practice); it needs no timer, only the time of
//! each request, which callers pass in so tests control it.
//!
//! The limiter is handed to the auth extractors as a request extension by [`crate::http::app`],
//! so it is checked after the token is resolved and before any handler work. Limits are off unless `[rate_limit] requests_per_second` is set (see
//! `deploy/consensor.example.toml` for why).
//!
//! Memory is bounded: buckets that have refilled completely carry no information and are dropped
//! whenever the table reaches [`MAX_TRACKED_CALLERS`]; should the table still be full (a flood from
//! that many distinct addresses at once), it is cleared, which at worst gives every caller a fresh
//! burst. IPv6 peers are keyed by their /64 prefix, since one host usually holds a whole /64.

use std::collections::HashMap;
use std::net::{IpAddr, SocketAddr};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use axum::extract::ConnectInfo;
use axum::http::request::Parts;

use crate::error::ApiError;

/// The most callers tracked at once before full buckets are pruned.
pub const MAX_TRACKED_CALLERS: usize = 100_000;

/// `[rate_limit]` of the configuration, validated.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RateLimitSettings {
    /// Sustained requests per second per caller; `None` turns rate limiting off.
    pub requests_per_second: Option<f64>,
    /// Requests a caller may make at once after being idle (the bucket's size).
    pub burst: f64,
}

impl Default for RateLimitSettings {
    fn default() -> Self {
        RateLimitSettings {
            requests_per_second: None,
            burst: DEFAULT_BURST,
        }
    }
}

/// The default bucket size, used when `requests_per_second` is set without `burst`.
pub const DEFAULT_BURST: f64 = 100.0;

/// Who a bucket belongs to.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum CallerKey {
    /// A token, by its public id.
    Token(String),
    /// An anonymous caller, by peer address (IPv6: the /64 prefix).
    Peer(IpAddr),
}

impl CallerKey {
    /// The key of an anonymous peer: the address itself for IPv4, the /64 prefix for IPv6.
    pub fn peer(address: IpAddr) -> CallerKey {
        match address {
            IpAddr::V4(_) => CallerKey::Peer(address),
            IpAddr::V6(v6) => match v6.to_ipv4_mapped() {
                Some(v4) => CallerKey::Peer(IpAddr::V4(v4)),
                None => {
                    let prefix = u128::from(v6) & !((1u128 << 64) - 1);
                    CallerKey::Peer(IpAddr::V6(prefix.into()))
                }
            },
        }
    }
}

#[derive(Debug, Clone, Copy)]
struct Bucket {
    /// Requests available, fractional between refills.
    available: f64,
    updated: Instant,
}

/// The shared table of buckets, or nothing when rate limiting is off; cheap to clone.
#[derive(Debug, Clone)]
pub struct RateLimiter {
    inner: Option<Arc<Limits>>,
}

#[derive(Debug)]
struct Limits {
    rate: f64,
    burst: f64,
    buckets: Mutex<HashMap<CallerKey, Bucket>>,
}

impl RateLimiter {
    /// A limiter for `settings`; one that allows everything when `requests_per_second` is unset.
    pub fn new(settings: &RateLimitSettings) -> RateLimiter {
        RateLimiter {
            inner: settings.requests_per_second.map(|rate| {
                Arc::new(Limits {
                    rate,
                    burst: settings.burst.max(1.0),
                    buckets: Mutex::new(HashMap::new()),
                })
            }),
        }
    }

    /// Whether limits are in force.
    pub fn is_enabled(&self) -> bool {
        self.inner.is_some()
    }

    /// Takes one request from `key`'s bucket at time `now`; when it is empty, returns how long
    /// until one request's worth has refilled.
    pub fn check_at(&self, key: &CallerKey, now: Instant) -> Result<(), Duration> {
        let Some(limits) = &self.inner else {
            return Ok(());
        };
        let mut buckets = limits
            .buckets
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        if !buckets.contains_key(key) && buckets.len() >= MAX_TRACKED_CALLERS {
            limits.prune(&mut buckets, now);
        }
        let bucket = buckets.entry(key.clone()).or_insert(Bucket {
            available: limits.burst,
            updated: now,
        });
        // `saturating_duration_since`: a time before the bucket's last update (two threads racing
        // for the lock) counts as no time at all.
        let elapsed = now.saturating_duration_since(bucket.updated).as_secs_f64();
        bucket.available = (bucket.available + elapsed * limits.rate).min(limits.burst);
        bucket.updated = bucket.updated.max(now);
        if bucket.available >= 1.0 {
            bucket.available -= 1.0;
            Ok(())
        } else {
            Err(Duration::from_secs_f64(
                (1.0 - bucket.available) / limits.rate,
            ))
        }
    }

    /// [`RateLimiter::check_at`] now, as a 429 [`ApiError`] when refused.
    pub fn check(&self, key: &CallerKey) -> Result<(), ApiError> {
        self.check_at(key, Instant::now()).map_err(|wait| {
            let (rate, burst) = self
                .inner
                .as_ref()
                .map_or((0.0, 0.0), |limits| (limits.rate, limits.burst));
            ApiError::too_many_requests(retry_after_seconds(wait), rate, burst)
        })
    }

    /// The number of callers tracked (for tests of the memory bound).
    pub fn tracked(&self) -> usize {
        self.inner.as_ref().map_or(0, |limits| {
            limits
                .buckets
                .lock()
                .unwrap_or_else(|poisoned| poisoned.into_inner())
                .len()
        })
    }
}

impl Limits {
    /// Drops the buckets that have refilled completely; clears the table if that frees nothing.
    fn prune(&self, buckets: &mut HashMap<CallerKey, Bucket>, now: Instant) {
        let (rate, burst) = (self.rate, self.burst);
        buckets.retain(|_, bucket| {
            let elapsed = now.saturating_duration_since(bucket.updated).as_secs_f64();
            bucket.available + elapsed * rate < burst
        });
        if buckets.len() >= MAX_TRACKED_CALLERS {
            tracing::warn!(
                callers = buckets.len(),
                "rate limiter table full of active callers; starting afresh"
            );
            buckets.clear();
        }
    }
}

/// Whole seconds to wait, rounded up, at least 1 (`Retry-After` takes whole seconds).
pub fn retry_after_seconds(wait: Duration) -> u64 {
    (wait.as_secs_f64().ceil() as u64).max(1)
}

/// Checks the limit of the token with id `token_id`, if the request carries a limiter.
pub(crate) fn check_token(parts: &Parts, token_id: &str) -> Result<(), ApiError> {
    match parts.extensions.get::<RateLimiter>() {
        Some(limiter) if limiter.is_enabled() => {
            limiter.check(&CallerKey::Token(token_id.to_owned()))
        }
        _ => Ok(()),
    }
}

/// Checks the limit of an anonymous caller by its peer address. The address is known when the
/// server was started with connection info (`into_make_service_with_connect_info`); without it
/// anonymous callers are not limited, since one shared bucket would let one client lock out all.
pub(crate) fn check_anonymous(parts: &Parts) -> Result<(), ApiError> {
    let Some(limiter) = parts
        .extensions
        .get::<RateLimiter>()
        .filter(|l| l.is_enabled())
    else {
        return Ok(());
    };
    match parts.extensions.get::<ConnectInfo<SocketAddr>>() {
        Some(ConnectInfo(peer)) => limiter.check(&CallerKey::peer(peer.ip())),
        None => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limiter(rate: f64, burst: f64) -> RateLimiter {
        RateLimiter::new(&RateLimitSettings {
            requests_per_second: Some(rate),
            burst,
        })
    }

    #[test]
    fn off_unless_a_rate_is_set() {
        let limiter = RateLimiter::new(&RateLimitSettings::default());
        assert!(!limiter.is_enabled());
        let key = CallerKey::Token("tok_a".into());
        let t0 = Instant::now();
        for _ in 0..1000 {
            assert_eq!(limiter.check_at(&key, t0), Ok(()));
        }
        assert_eq!(limiter.tracked(), 0);
    }

    #[test]
    fn a_bucket_allows_its_burst_then_refills_at_the_rate() {
        // Token bucket arithmetic (common practice): size 3, 2 per second.
        let limiter = limiter(2.0, 3.0);
        let key = CallerKey::Token("tok_a".into());
        let t0 = Instant::now();
        for _ in 0..3 {
            assert_eq!(limiter.check_at(&key, t0), Ok(()));
        }
        // Empty: one request's worth takes 1/2 s to refill.
        assert_eq!(limiter.check_at(&key, t0), Err(Duration::from_millis(500)));
        // A refused request takes nothing: 0.25 s later half a request has refilled, 0.25 s to go.
        assert_eq!(
            limiter.check_at(&key, t0 + Duration::from_millis(250)),
            Err(Duration::from_millis(250))
        );
        assert_eq!(
            limiter.check_at(&key, t0 + Duration::from_millis(500)),
            Ok(())
        );
        // Idle for a long time: the bucket holds at most its burst.
        let later = t0 + Duration::from_secs(3600);
        for _ in 0..3 {
            assert_eq!(limiter.check_at(&key, later), Ok(()));
        }
        assert!(limiter.check_at(&key, later).is_err());
    }

    #[test]
    fn callers_have_separate_buckets() {
        let limiter = limiter(1.0, 1.0);
        let t0 = Instant::now();
        let a = CallerKey::Token("tok_a".into());
        let b = CallerKey::Token("tok_b".into());
        assert_eq!(limiter.check_at(&a, t0), Ok(()));
        assert!(limiter.check_at(&a, t0).is_err());
        assert_eq!(limiter.check_at(&b, t0), Ok(()));
    }

    #[test]
    fn retry_after_rounds_up_to_whole_seconds() {
        // RFC 9110 §10.2.3: delay-seconds is a non-negative whole number; rounding up never tells a
        // client to come back before it would get through.
        assert_eq!(retry_after_seconds(Duration::from_millis(1)), 1);
        assert_eq!(retry_after_seconds(Duration::from_millis(1000)), 1);
        assert_eq!(retry_after_seconds(Duration::from_millis(1001)), 2);
        assert_eq!(retry_after_seconds(Duration::from_secs(10)), 10);
    }

    #[test]
    fn ipv6_peers_are_keyed_by_their_64_prefix() {
        // RFC 4291 §2.5.4: global unicast addresses have a 64-bit interface id; RFC 4291 §2.5.5.2:
        // ::ffff:a.b.c.d is an IPv4-mapped address. (2001:db8::/32 is the documentation prefix,
        // RFC 3849.)
        let a: IpAddr = "2001:db8:1:2:aaaa::1".parse().unwrap();
        let b: IpAddr = "2001:db8:1:2:bbbb::2".parse().unwrap();
        let c: IpAddr = "2001:db8:1:3::1".parse().unwrap();
        assert_eq!(CallerKey::peer(a), CallerKey::peer(b));
        assert_ne!(CallerKey::peer(a), CallerKey::peer(c));
        let mapped: IpAddr = "::ffff:192.0.2.1".parse().unwrap();
        assert_eq!(
            CallerKey::peer(mapped),
            CallerKey::Peer("192.0.2.1".parse().unwrap())
        );
    }

    #[test]
    fn the_table_is_bounded() {
        let limiter = limiter(1.0, 2.0);
        let t0 = Instant::now();
        // Every caller uses one request of two: none is full, so once the table is full it is
        // cleared rather than grown.
        for n in 0..MAX_TRACKED_CALLERS + 10 {
            let key = CallerKey::Token(format!("tok_{n}"));
            assert_eq!(limiter.check_at(&key, t0), Ok(()));
        }
        assert!(limiter.tracked() <= MAX_TRACKED_CALLERS);
        // Two seconds on, every bucket has refilled: pruning drops them all but the newcomer.
        let later = t0 + Duration::from_secs(2);
        for n in 0..MAX_TRACKED_CALLERS {
            let key = CallerKey::Token(format!("new_{n}"));
            limiter.check_at(&key, later).unwrap();
        }
        assert!(limiter.tracked() <= MAX_TRACKED_CALLERS);
    }
}

//! A small in-memory cache of verified bearer tokens, so that a request does not wait for a
//! database round trip to learn who is calling.
//!
//! Only tokens the database confirmed are kept, keyed by their SHA-256 digest (the secret itself
//! is never stored), each for at most [`TOKEN_CACHE_TTL`]. Unknown tokens are not cached: a token
//! just made by `halfwave token create` works at once, and a flood of made-up tokens cannot fill
//! memory (they cost a lookup each, as before). Revoking through the API removes the token's
//! entry before the response is sent, so the next request with it is refused; a lookup that was
//! already under way when the token was revoked does not put it back (each revocation moves a
//! generation counter, and a lookup stores its answer only if the counter has not moved). A token revoked by
//! `halfwave token revoke` (another process writing the database directly) is refused at most
//! [`TOKEN_CACHE_TTL`] later, when its entry expires. The cache holds at most
//! [`TOKEN_CACHE_CAPACITY`] tokens and starts over when full.

use super::tokens::TokenHolder;
use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// How long a verified token is trusted without asking the database again.
pub const TOKEN_CACHE_TTL: Duration = Duration::from_secs(1);

/// The most tokens kept at once (far more than a lab hands out).
pub const TOKEN_CACHE_CAPACITY: usize = 256;

/// Verified tokens by digest, with the time they were verified.
#[derive(Debug, Default)]
pub struct TokenCache {
    entries: Mutex<HashMap<String, (TokenHolder, Instant)>>,
    /// Moves on every revocation; see [`TokenCache::lookup_generation`].
    generation: AtomicU64,
}

impl TokenCache {
    /// The holder of the token with this digest, if it was verified less than the TTL ago.
    pub fn get(&self, digest: &str) -> Option<TokenHolder> {
        self.get_at(digest, Instant::now())
    }

    fn get_at(&self, digest: &str, now: Instant) -> Option<TokenHolder> {
        let mut entries = self.entries.lock().ok()?;
        match entries.get(digest) {
            Some((holder, verified)) if now.duration_since(*verified) < TOKEN_CACHE_TTL => {
                Some(holder.clone())
            }
            Some(_) => {
                entries.remove(digest);
                None
            }
            None => None,
        }
    }

    /// Read before asking the database; pass it to [`TokenCache::insert`] with the answer.
    pub fn lookup_generation(&self) -> u64 {
        self.generation.load(Ordering::SeqCst)
    }

    /// Remembers a token the database just confirmed, unless a token was revoked since the
    /// lookup began (`generation` from [`TokenCache::lookup_generation`]).
    pub fn insert(&self, digest: String, holder: TokenHolder, generation: u64) {
        self.insert_at(digest, holder, generation, Instant::now());
    }

    fn insert_at(&self, digest: String, holder: TokenHolder, generation: u64, now: Instant) {
        if let Ok(mut entries) = self.entries.lock() {
            if self.generation.load(Ordering::SeqCst) != generation {
                return;
            }
            if entries.len() >= TOKEN_CACHE_CAPACITY && !entries.contains_key(&digest) {
                entries.clear();
            }
            entries.insert(digest, (holder, now));
        }
    }

    /// Forgets every token named `name` (called when it is revoked).
    pub fn forget_name(&self, name: &str) {
        if let Ok(mut entries) = self.entries.lock() {
            self.generation.fetch_add(1, Ordering::SeqCst);
            entries.retain(|_, (holder, _)| holder.name != name);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::tokens::Role;

    fn holder(name: &str) -> TokenHolder {
        TokenHolder {
            id: 1,
            name: name.to_string(),
            role: Role::Viewer,
        }
    }

    #[test]
    fn entries_expire_after_the_ttl() {
        let cache = TokenCache::default();
        let t0 = Instant::now();
        cache.insert_at("d1".into(), holder("lab-b"), cache.lookup_generation(), t0);
        assert_eq!(cache.get_at("d1", t0), Some(holder("lab-b")));
        let almost = t0 + TOKEN_CACHE_TTL - Duration::from_millis(1);
        assert_eq!(cache.get_at("d1", almost), Some(holder("lab-b")));
        assert_eq!(cache.get_at("d1", t0 + TOKEN_CACHE_TTL), None);
        assert_eq!(cache.get_at("unknown", t0), None);
    }

    #[test]
    fn revoking_a_name_forgets_its_tokens_only() {
        let cache = TokenCache::default();
        cache.insert("d1".into(), holder("lab-b"), cache.lookup_generation());
        cache.insert("d2".into(), holder("lab-c"), cache.lookup_generation());
        cache.forget_name("lab-b");
        assert_eq!(cache.get("d1"), None);
        assert_eq!(cache.get("d2"), Some(holder("lab-c")));
    }

    #[test]
    fn a_lookup_that_began_before_a_revocation_is_not_cached() {
        let cache = TokenCache::default();
        let before = cache.lookup_generation();
        // The database said "active", then the token was revoked before the answer was cached.
        cache.forget_name("lab-b");
        cache.insert("d1".into(), holder("lab-b"), before);
        assert_eq!(cache.get("d1"), None);
        cache.insert("d1".into(), holder("lab-b"), cache.lookup_generation());
        assert_eq!(cache.get("d1"), Some(holder("lab-b")));
    }

    #[test]
    fn a_full_cache_starts_over_instead_of_growing() {
        let cache = TokenCache::default();
        for i in 0..TOKEN_CACHE_CAPACITY {
            cache.insert(format!("d{i}"), holder("n"), 0);
        }
        cache.insert("new".into(), holder("m"), 0);
        assert_eq!(cache.get("new"), Some(holder("m")));
        assert_eq!(cache.get("d0"), None);
        assert!(cache.entries.lock().unwrap().len() <= TOKEN_CACHE_CAPACITY);
    }
}

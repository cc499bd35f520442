//! One-time tickets for the event stream.
//!
//! A browser's EventSource cannot send an Authorization header, and a token in the URL ends up in
//! proxy and server logs. So the dashboard first asks `POST /api/v1/events/ticket` with its bearer
//! header and opens `/api/v1/events?ticket=...`: the ticket opens one stream, once, within
//! [`TICKET_LIFETIME`], with the role of the token that asked for it. A logged ticket is worth
//! nothing: it is spent or expired by the time anyone reads the log.
//!
//! Tickets live in memory only (a restarted daemon forgets them; the page asks again). They are
//! kept by their SHA-256 digest, like tokens, and at most [`MAX_OUTSTANDING`] at once: asking
//! for more drops the expired ones, then the oldest, so no caller can grow the daemon's memory.

use super::tokens::{digest_hex, hex, TokenError, TokenHolder};
use rand::rngs::OsRng;
use rand::TryRngCore;
use std::collections::HashMap;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// How long a ticket may wait for its stream.
pub const TICKET_LIFETIME: Duration = Duration::from_secs(30);

/// Tickets kept at once.
pub const MAX_OUTSTANDING: usize = 1024;

/// What a ticket starts with, so it is never taken for a token (`hwt_`).
pub const TICKET_PREFIX: &str = "hwe_";

#[derive(Debug)]
struct Outstanding {
    holder: TokenHolder,
    expires: Instant,
}

/// The outstanding tickets.
#[derive(Debug, Default)]
pub struct EventTickets {
    by_digest: Mutex<HashMap<String, Outstanding>>,
}

impl EventTickets {
    /// A fresh ticket for `holder`, valid for [`TICKET_LIFETIME`] from `now`.
    pub fn issue(&self, holder: TokenHolder, now: Instant) -> Result<String, TokenError> {
        let mut bytes = [0u8; 32];
        OsRng
            .try_fill_bytes(&mut bytes)
            .map_err(|e| TokenError::Random(e.to_string()))?;
        let ticket = format!("{TICKET_PREFIX}{}", hex(&bytes));
        let mut tickets = self
            .by_digest
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        if tickets.len() >= MAX_OUTSTANDING {
            tickets.retain(|_, t| t.expires > now);
        }
        while tickets.len() >= MAX_OUTSTANDING {
            let oldest = tickets
                .iter()
                .min_by_key(|(_, t)| t.expires)
                .map(|(digest, _)| digest.clone());
            match oldest {
                Some(digest) => tickets.remove(&digest),
                None => break,
            };
        }
        tickets.insert(
            digest_hex(&ticket),
            Outstanding {
                holder,
                expires: now + TICKET_LIFETIME,
            },
        );
        Ok(ticket)
    }

    /// Spends `ticket`: who asked for it, if it was issued, not yet used and not expired at `now`.
    /// A ticket is gone after this call whatever the answer.
    pub fn redeem(&self, ticket: &str, now: Instant) -> Option<TokenHolder> {
        let mut tickets = self
            .by_digest
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let outstanding = tickets.remove(&digest_hex(ticket))?;
        (outstanding.expires > now).then_some(outstanding.holder)
    }

    /// Tickets kept now (for tests).
    pub fn outstanding(&self) -> usize {
        self.by_digest
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::tokens::Role;

    fn holder(role: Role) -> TokenHolder {
        TokenHolder {
            id: 7,
            name: "lab-screen".into(),
            role,
        }
    }

    #[test]
    fn a_ticket_works_once_with_its_role() {
        let tickets = EventTickets::default();
        let now = Instant::now();
        let ticket = tickets.issue(holder(Role::Operator), now).unwrap();
        assert!(ticket.starts_with(TICKET_PREFIX) && ticket.len() == 4 + 64);
        let redeemed = tickets
            .redeem(&ticket, now + Duration::from_secs(1))
            .unwrap();
        assert_eq!((redeemed.id, redeemed.role), (7, Role::Operator));
        assert!(tickets
            .redeem(&ticket, now + Duration::from_secs(2))
            .is_none());
        assert!(tickets.redeem("hwe_made_up", now).is_none());
    }

    #[test]
    fn an_expired_ticket_is_refused_and_forgotten() {
        let tickets = EventTickets::default();
        let now = Instant::now();
        let ticket = tickets.issue(holder(Role::Viewer), now).unwrap();
        assert!(tickets.redeem(&ticket, now + TICKET_LIFETIME).is_none());
        assert_eq!(tickets.outstanding(), 0);
    }

    #[test]
    fn outstanding_tickets_are_bounded() {
        let tickets = EventTickets::default();
        let start = Instant::now();
        let first = tickets.issue(holder(Role::Viewer), start).unwrap();
        for i in 1..=MAX_OUTSTANDING as u64 + 10 {
            tickets
                .issue(holder(Role::Viewer), start + Duration::from_millis(i))
                .unwrap();
        }
        assert_eq!(tickets.outstanding(), MAX_OUTSTANDING);
        // The oldest made room for the newer ones.
        assert!(tickets.redeem(&first, start).is_none());
    }
}

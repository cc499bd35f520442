//! Webhook deliveries (table `webhook_deliveries`, migration 0010): the notifier's outbox.
//!
//! A delivery is written `pending` when the notifier sees an event (one row per event and
//! receiver URL, the JSON body fixed then), and moved after each attempt: to `delivered`, to
//! `failed` once its attempts are used up, or kept `pending` with the time of the next attempt
//! and the last error. Because the outbox is in the database, a daemon that stops or dies with
//! deliveries outstanding sends them after it starts again. See `crate::notify`.
//!
//! Several daemons may share one database (PostgreSQL), each with its own `[[webhook]]` list.
//! A sender therefore only reads rows for the URLs it is configured with, and takes a row for an
//! attempt by a **claim**: one conditional UPDATE that moves the row's due time past the attempt
//! (`next_attempt_at_unix_ms` from a time at or before now to `claim_until`) and succeeds for one
//! sender only. A sender that dies mid-attempt leaves the row due again when its claim runs out,
//! so a delivery is sent at least once; receivers de-duplicate by event id.

use super::{now_unix_ms, Store, StoreError};
use sqlx::AssertSqlSafe;

/// One delivery as stored.
#[derive(Debug, Clone, PartialEq, Eq, sqlx::FromRow)]
pub struct WebhookDelivery {
    pub id: i64,
    pub event_id: String,
    pub event_type: String,
    pub url: String,
    pub body: String,
    /// `pending`, `delivered` or `failed`.
    pub state: String,
    pub attempts: i64,
    pub next_attempt_at_unix_ms: i64,
    pub last_error: Option<String>,
    pub created_at_unix_ms: i64,
    pub delivered_at_unix_ms: Option<i64>,
}

/// A delivery to be written: one event for one receiver.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct NewWebhookDelivery<'a> {
    pub event_id: &'a str,
    pub event_type: &'a str,
    pub url: &'a str,
    pub body: &'a str,
}

/// Deliveries by state, for the metrics.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct WebhookDeliveryCounts {
    pub pending: i64,
    pub delivered: i64,
    pub failed: i64,
}

/// The columns of [`WebhookDelivery`], for `concat!` (sqlx wants static SQL).
macro_rules! columns {
    () => {
        "id, event_id, event_type, url, body, state, attempts, next_attempt_at_unix_ms, \
         last_error, created_at_unix_ms, delivered_at_unix_ms"
    };
}

impl Store {
    /// Records deliveries as pending, due now, in one transaction. A delivery already recorded
    /// for the same event and URL is left as it is.
    pub async fn add_webhook_deliveries(
        &self,
        deliveries: &[NewWebhookDelivery<'_>],
    ) -> Result<(), StoreError> {
        let now = now_unix_ms();
        on_pool!(&self.pool, pool => {
        let mut tx = pool
            .begin()
            .await
            .map_err(StoreError::database("recording webhook deliveries"))?;
        for d in deliveries {
            sqlx::query(
                "INSERT INTO webhook_deliveries \
                 (event_id, event_type, url, body, state, attempts, next_attempt_at_unix_ms, created_at_unix_ms) \
                 VALUES ($1, $2, $3, $4, 'pending', 0, $5, $6) ON CONFLICT (event_id, url) DO NOTHING",
            )
            .bind(d.event_id)
            .bind(d.event_type)
            .bind(d.url)
            .bind(d.body)
            .bind(now)
            .bind(now)
            .execute(&mut *tx)
            .await
            .map_err(StoreError::database("recording a webhook delivery"))?;
        }
        tx.commit()
            .await
            .map_err(StoreError::database("recording webhook deliveries"))
        })
    }

    /// Pending deliveries for `urls` due at `now_ms`, oldest first, at most `limit`. Reading is
    /// not taking: a sender takes a row with [`Store::claim_webhook_delivery`] just before its
    /// attempt.
    pub async fn due_webhook_deliveries(
        &self,
        now_ms: i64,
        urls: &[String],
        limit: i64,
    ) -> Result<Vec<WebhookDelivery>, StoreError> {
        if urls.is_empty() {
            return Ok(Vec::new());
        }
        let sql = format!(
            concat!(
                "SELECT ",
                columns!(),
                " FROM webhook_deliveries WHERE state = 'pending' AND next_attempt_at_unix_ms <= $1 \
                 AND url IN ({}) ORDER BY next_attempt_at_unix_ms, id LIMIT $2"
            ),
            url_placeholders(3, urls.len())
        );
        on_pool!(&self.pool, pool => {
            let mut query = sqlx::query_as(AssertSqlSafe(sql.clone())).bind(now_ms).bind(limit);
            for url in urls {
                query = query.bind(url.as_str());
            }
            query.fetch_all(pool).await
        })
        .map_err(StoreError::database("reading due webhook deliveries"))
    }

    /// Takes one delivery for an attempt: moves its due time from `due_at_unix_ms` (as read, at
    /// or before now) to `claim_until_unix_ms`. True when this caller got it; false when another
    /// sender claimed, delivered or rescheduled it first.
    pub async fn claim_webhook_delivery(
        &self,
        id: i64,
        due_at_unix_ms: i64,
        claim_until_unix_ms: i64,
    ) -> Result<bool, StoreError> {
        let claimed = on_pool!(&self.pool, pool => sqlx::query(
            "UPDATE webhook_deliveries SET next_attempt_at_unix_ms = $1 \
             WHERE id = $2 AND state = 'pending' AND next_attempt_at_unix_ms = $3",
        )
        .bind(claim_until_unix_ms)
        .bind(id)
        .bind(due_at_unix_ms)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("claiming a webhook delivery"))?;
        Ok(claimed == 1)
    }

    /// Marks `failed` the pending deliveries for URLs not in `urls` that have been due since
    /// `overdue_since_ms` or earlier, with `reason` as their last error; returns how many. With
    /// one daemon per database such a row is for a receiver removed from the configuration; on a
    /// shared database it may be another daemon's, so the caller gives those a long grace.
    pub async fn fail_orphan_webhook_deliveries(
        &self,
        urls: &[String],
        overdue_since_ms: i64,
        reason: &str,
    ) -> Result<u64, StoreError> {
        let url_filter = if urls.is_empty() {
            String::new()
        } else {
            format!("AND url NOT IN ({})", url_placeholders(3, urls.len()))
        };
        let sql = format!(
            "UPDATE webhook_deliveries SET state = 'failed', last_error = $1 \
             WHERE state = 'pending' AND next_attempt_at_unix_ms <= $2 {url_filter}"
        );
        on_pool!(&self.pool, pool => {
            let mut query = sqlx::query(AssertSqlSafe(sql.clone()))
                .bind(reason)
                .bind(overdue_since_ms);
            for url in urls {
                query = query.bind(url.as_str());
            }
            query.execute(pool).await.map(|done| done.rows_affected())
        })
        .map_err(StoreError::database(
            "failing webhook deliveries without a receiver",
        ))
    }

    /// Makes every pending delivery for `urls` due now (at start-up: a restart often follows a
    /// fix at the receiver's end, so waiting out a long backoff would only delay the news).
    /// Returns how many are pending for them.
    pub async fn webhook_pending_due_now(&self, urls: &[String]) -> Result<u64, StoreError> {
        if urls.is_empty() {
            return Ok(0);
        }
        let now = now_unix_ms();
        let sql = format!(
            "UPDATE webhook_deliveries SET next_attempt_at_unix_ms = $1 \
             WHERE state = 'pending' AND next_attempt_at_unix_ms > $2 AND url IN ({})",
            url_placeholders(3, urls.len())
        );
        on_pool!(&self.pool, pool => {
            let mut query = sqlx::query(AssertSqlSafe(sql.clone())).bind(now).bind(now);
            for url in urls {
                query = query.bind(url.as_str());
            }
            query.execute(pool).await.map(|_| ())
        })
        .map_err(StoreError::database(
            "rescheduling pending webhook deliveries",
        ))?;
        let sql = format!(
            "SELECT COUNT(*) FROM webhook_deliveries WHERE state = 'pending' AND url IN ({})",
            url_placeholders(1, urls.len())
        );
        let pending: i64 = on_pool!(&self.pool, pool => {
            let mut query = sqlx::query_scalar(AssertSqlSafe(sql.clone()));
            for url in urls {
                query = query.bind(url.as_str());
            }
            query.fetch_one(pool).await
        })
        .map_err(StoreError::database("counting pending webhook deliveries"))?;
        Ok(pending.unsigned_abs())
    }

    /// When the next pending delivery for `urls` is due; `None` when none is pending for them.
    pub async fn next_webhook_due_at(&self, urls: &[String]) -> Result<Option<i64>, StoreError> {
        if urls.is_empty() {
            return Ok(None);
        }
        let sql = format!(
            "SELECT MIN(next_attempt_at_unix_ms) FROM webhook_deliveries \
             WHERE state = 'pending' AND url IN ({})",
            url_placeholders(1, urls.len())
        );
        on_pool!(&self.pool, pool => {
            let mut query = sqlx::query_scalar(AssertSqlSafe(sql.clone()));
            for url in urls {
                query = query.bind(url.as_str());
            }
            query.fetch_one(pool).await
        })
        .map_err(StoreError::database(
            "reading the next webhook delivery time",
        ))
    }

    /// Every delivery, newest first, at most `limit` (for tests and inspection).
    pub async fn webhook_deliveries(&self, limit: i64) -> Result<Vec<WebhookDelivery>, StoreError> {
        on_pool!(&self.pool, pool => sqlx::query_as(concat!(
            "SELECT ",
            columns!(),
            " FROM webhook_deliveries ORDER BY id DESC LIMIT $1"
        ))
        .bind(limit)
        .fetch_all(pool)
        .await)
        .map_err(StoreError::database("reading webhook deliveries"))
    }

    /// Marks a delivery delivered after its attempt.
    pub async fn webhook_delivered(&self, id: i64) -> Result<(), StoreError> {
        on_pool!(&self.pool, pool => sqlx::query(
            "UPDATE webhook_deliveries SET state = 'delivered', attempts = attempts + 1, \
             delivered_at_unix_ms = $1, last_error = NULL WHERE id = $2",
        )
        .bind(now_unix_ms())
        .bind(id)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("marking a webhook delivered"))?;
        Ok(())
    }

    /// Records a failed attempt: the delivery stays pending until `retry_at_unix_ms`, or becomes
    /// `failed` for good when that is `None`.
    pub async fn webhook_attempt_failed(
        &self,
        id: i64,
        error: &str,
        retry_at_unix_ms: Option<i64>,
    ) -> Result<(), StoreError> {
        let (state, next) = match retry_at_unix_ms {
            Some(at) => ("pending", at),
            None => ("failed", now_unix_ms()),
        };
        on_pool!(&self.pool, pool => sqlx::query(
            "UPDATE webhook_deliveries SET state = $1, attempts = attempts + 1, \
             next_attempt_at_unix_ms = $2, last_error = $3 WHERE id = $4",
        )
        .bind(state)
        .bind(next)
        .bind(error)
        .bind(id)
        .execute(pool)
        .await.map(|done| done.rows_affected()))
        .map_err(StoreError::database("recording a failed webhook attempt"))?;
        Ok(())
    }

    /// Deliveries by state (one grouped count).
    pub async fn webhook_delivery_counts(&self) -> Result<WebhookDeliveryCounts, StoreError> {
        let rows: Vec<(String, i64)> =
            on_pool!(&self.pool, pool => sqlx::query_as("SELECT state, COUNT(*) FROM webhook_deliveries GROUP BY state")
                .fetch_all(pool)
                .await)
                .map_err(StoreError::database("counting webhook deliveries"))?;
        let mut counts = WebhookDeliveryCounts::default();
        for (state, n) in rows {
            match state.as_str() {
                "pending" => counts.pending = n,
                "delivered" => counts.delivered = n,
                "failed" => counts.failed = n,
                _ => {}
            }
        }
        Ok(counts)
    }
}

/// `$first, $first+1, ...` for `count` bound values (the URLs of an `IN (...)` list).
fn url_placeholders(first: usize, count: usize) -> String {
    (first..first + count)
        .map(|n| format!("${n}"))
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn new<'a>(event_id: &'a str, url: &'a str) -> NewWebhookDelivery<'a> {
        NewWebhookDelivery {
            event_id,
            event_type: "run.completed",
            url,
            body: "{}",
        }
    }

    #[tokio::test]
    async fn a_delivery_goes_pending_retry_then_delivered_or_failed() {
        let store = Store::open_in_memory().await.unwrap();
        let urls = vec!["http://a/".to_string(), "http://b/".to_string()];
        store
            .add_webhook_deliveries(&[new("e1", "http://a/"), new("e1", "http://b/")])
            .await
            .unwrap();
        // The same event for the same URL is not recorded twice.
        store
            .add_webhook_deliveries(&[new("e1", "http://a/")])
            .await
            .unwrap();
        let due = store
            .due_webhook_deliveries(now_unix_ms(), &urls, 10)
            .await
            .unwrap();
        assert_eq!(due.len(), 2);
        let (a, b) = (due[0].id, due[1].id);

        let later = now_unix_ms() + 60_000;
        store
            .webhook_attempt_failed(a, "connection refused", Some(later))
            .await
            .unwrap();
        store
            .webhook_attempt_failed(b, "HTTP 500", None)
            .await
            .unwrap();
        assert!(store
            .due_webhook_deliveries(now_unix_ms(), &urls, 10)
            .await
            .unwrap()
            .is_empty());
        assert_eq!(store.next_webhook_due_at(&urls).await.unwrap(), Some(later));
        // At start-up every pending delivery becomes due at once.
        assert_eq!(store.webhook_pending_due_now(&urls).await.unwrap(), 1);
        assert!(store.next_webhook_due_at(&urls).await.unwrap().unwrap() <= now_unix_ms());
        store
            .webhook_attempt_failed(a, "connection refused", Some(later))
            .await
            .unwrap();
        let due = store
            .due_webhook_deliveries(later, &urls, 10)
            .await
            .unwrap();
        assert_eq!(due.len(), 1);
        assert_eq!(due[0].attempts, 2);
        assert_eq!(due[0].last_error.as_deref(), Some("connection refused"));

        store.webhook_delivered(a).await.unwrap();
        assert_eq!(
            store.webhook_delivery_counts().await.unwrap(),
            WebhookDeliveryCounts {
                pending: 0,
                delivered: 1,
                failed: 1
            }
        );
        assert_eq!(store.next_webhook_due_at(&urls).await.unwrap(), None);
        let all = store.webhook_deliveries(10).await.unwrap();
        let delivered = all.iter().find(|d| d.id == a).unwrap();
        assert_eq!(delivered.attempts, 3);
        assert!(delivered.delivered_at_unix_ms.is_some());
        assert_eq!(delivered.last_error, None);
    }

    #[tokio::test]
    async fn a_sender_sees_only_its_own_urls_and_a_claimed_row_is_taken_once() {
        let store = Store::open_in_memory().await.unwrap();
        store
            .add_webhook_deliveries(&[new("e1", "http://mine/"), new("e1", "http://theirs/")])
            .await
            .unwrap();
        let mine = vec!["http://mine/".to_string()];
        let theirs = vec!["http://theirs/".to_string()];
        let now = now_unix_ms();
        let due = store.due_webhook_deliveries(now, &mine, 10).await.unwrap();
        assert_eq!(due.len(), 1);
        assert_eq!(due[0].url, "http://mine/");
        assert!(store
            .due_webhook_deliveries(now, &[], 10)
            .await
            .unwrap()
            .is_empty());

        // Two senders that read the same due row: the first claim wins, the second gets nothing.
        let row = &due[0];
        let until = now + 30_000;
        assert!(store
            .claim_webhook_delivery(row.id, row.next_attempt_at_unix_ms, until)
            .await
            .unwrap());
        assert!(!store
            .claim_webhook_delivery(row.id, row.next_attempt_at_unix_ms, until)
            .await
            .unwrap());
        // Claimed, it is no longer due, and the next due time is the claim's end.
        assert!(store
            .due_webhook_deliveries(now, &mine, 10)
            .await
            .unwrap()
            .is_empty());
        assert_eq!(store.next_webhook_due_at(&mine).await.unwrap(), Some(until));
        // A claim that ran out (the claimer died mid-attempt) makes the row due again.
        let again = store
            .due_webhook_deliveries(until, &mine, 10)
            .await
            .unwrap();
        assert_eq!(again.len(), 1);
        assert!(store
            .claim_webhook_delivery(again[0].id, until, until + 30_000)
            .await
            .unwrap());

        // The other URL's row is left to its sender while within the grace, failed after it.
        assert_eq!(
            store
                .fail_orphan_webhook_deliveries(&mine, now - 60_000, "no receiver")
                .await
                .unwrap(),
            0
        );
        assert!(store.next_webhook_due_at(&theirs).await.unwrap().unwrap() <= now_unix_ms());
        assert_eq!(
            store
                .fail_orphan_webhook_deliveries(&mine, now_unix_ms(), "no receiver")
                .await
                .unwrap(),
            1
        );
        let counts = store.webhook_delivery_counts().await.unwrap();
        assert_eq!((counts.pending, counts.failed), (1, 1));
    }
}

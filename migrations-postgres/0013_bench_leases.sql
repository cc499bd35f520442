-- PostgreSQL twin of migrations/0013_bench_leases.sql (identical SQL).

-- Bench leases: which daemon drives each bench, for databases shared by several daemons (one
-- per bench PC, PostgreSQL). A daemon takes the lease of every bench it configures at start-up,
-- before it touches an instrument, renews it while it runs (heartbeat) and deletes it on a clean
-- shutdown. A lease whose expiry has passed belongs to a daemon that died: the next daemon
-- configuring that bench takes it over, switches the bench's source off and marks its running
-- runs interrupted. Times are the database server's clock (one clock for every bench PC), in
-- milliseconds since the Unix epoch. With SQLite the claim is the local lock file instead
-- (server/src/data_claim.rs) and this table stays empty; it exists in both sets so the schemas
-- stay alike.
CREATE TABLE bench_leases (
    bench_name TEXT PRIMARY KEY,
    holder TEXT NOT NULL,
    host TEXT NOT NULL,
    pid BIGINT NOT NULL,
    listen TEXT NOT NULL,
    acquired_at_unix_ms BIGINT NOT NULL,
    heartbeat_at_unix_ms BIGINT NOT NULL,
    expires_at_unix_ms BIGINT NOT NULL
);

CREATE INDEX bench_leases_by_holder ON bench_leases (holder);

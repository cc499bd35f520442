-- API bearer tokens. The token itself is shown once at creation and never stored: only its
-- SHA-256 digest (lower-case hex) is kept, so a copy of the database does not give access.
-- A revoked token keeps its row (for the audit trail) with `revoked_at_unix_ms` set; a name can be
-- reused once the token that carried it is revoked.
CREATE TABLE api_tokens (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    role TEXT NOT NULL CHECK (role IN ('viewer', 'operator', 'admin')),
    token_sha256 TEXT NOT NULL UNIQUE,
    created_at_unix_ms BIGINT NOT NULL,
    created_by TEXT NOT NULL,
    revoked_at_unix_ms BIGINT
);

CREATE UNIQUE INDEX api_tokens_active_name ON api_tokens (name) WHERE revoked_at_unix_ms IS NULL;

-- People who use the browser pages and the API: users with a role, their
-- sign-in sessions, their personal API tokens, and the audit trail of
-- administrative actions. Times are UTC, stored as RFC 3339 text with
-- millisecond precision. Secrets (session cookies, tokens) are stored only as
-- SHA-256 hashes; passwords only as argon2id PHC strings.

CREATE TABLE users (
    id                  INTEGER PRIMARY KEY,
    email               TEXT NOT NULL UNIQUE,
    password_hash       TEXT NOT NULL,
    role                TEXT NOT NULL CHECK (role IN ('viewer', 'engineer', 'admin')),
    created_at          TEXT NOT NULL,
    password_changed_at TEXT NOT NULL
);

CREATE TABLE sessions (
    id           INTEGER PRIMARY KEY,
    user_id      INTEGER NOT NULL REFERENCES users(id) ON DELETE CASCADE,
    token_hash   TEXT NOT NULL UNIQUE,
    csrf_token   TEXT NOT NULL,
    created_at   TEXT NOT NULL,
    last_seen_at TEXT NOT NULL
);
CREATE INDEX sessions_by_user ON sessions (user_id);

CREATE TABLE user_tokens (
    id           INTEGER PRIMARY KEY,
    user_id      INTEGER NOT NULL REFERENCES users(id) ON DELETE CASCADE,
    token_hash   TEXT NOT NULL UNIQUE,
    label        TEXT NOT NULL DEFAULT '',
    created_at   TEXT NOT NULL,
    revoked_at   TEXT,
    last_used_at TEXT
);
CREATE INDEX user_tokens_by_user ON user_tokens (user_id);

CREATE TABLE audit_events (
    id     INTEGER PRIMARY KEY,
    at     TEXT NOT NULL,
    actor  TEXT NOT NULL,
    action TEXT NOT NULL,
    target TEXT NOT NULL DEFAULT '',
    detail TEXT NOT NULL DEFAULT ''
);
CREATE INDEX audit_events_by_time ON audit_events (at);

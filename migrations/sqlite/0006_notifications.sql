-- Alert notifications: recipients, the transactional outbox of emails, and the
-- daily digest runs. Times are UTC, stored as RFC 3339 text with millisecond precision.

-- Who receives alert emails: for one site or (site_id NULL) for every site, from a
-- minimum level rank (0 = notices such as line-wide wetting and data quality,
-- 1… = trigger levels). A digest-only recipient gets one daily digest instead of
-- an email per event.
CREATE TABLE recipients (
    id          INTEGER PRIMARY KEY,
    email       TEXT NOT NULL,
    name        TEXT NOT NULL DEFAULT '',
    site_id     INTEGER REFERENCES sites(id),
    min_level   INTEGER NOT NULL CHECK (min_level >= 0),
    digest_only INTEGER NOT NULL DEFAULT 0,
    created_at  TEXT NOT NULL
);
CREATE INDEX recipients_by_site ON recipients (site_id);

-- One rendered email body, shared by every recipient of it: an alert event
-- (kind 'alert', with the facts a digest lists) or a digest (kind 'digest').
CREATE TABLE mail_messages (
    id          INTEGER PRIMARY KEY,
    kind        TEXT NOT NULL CHECK (kind IN ('alert', 'digest')),
    alert_id    INTEGER,
    event       TEXT,
    site        TEXT,
    line        TEXT,
    level_rank  INTEGER,
    level_label TEXT,
    summary     TEXT,
    link        TEXT,
    event_at    TEXT,
    subject     TEXT NOT NULL,
    body_text   TEXT NOT NULL,
    body_html   TEXT NOT NULL,
    created_at  TEXT NOT NULL
);

CREATE TABLE mail_attachments (
    message_id   INTEGER NOT NULL REFERENCES mail_messages(id),
    position     INTEGER NOT NULL,
    filename     TEXT NOT NULL,
    content_type TEXT NOT NULL,
    content      BLOB NOT NULL,
    PRIMARY KEY (message_id, position)
);

-- One row per recipient of a message. status: 'pending' (to send when
-- next_attempt_at has passed and no live lease holds it), 'sent', 'failed'
-- (refused permanently by the SMTP server), 'digest' (waiting for the next digest:
-- digest-only recipient or over the hourly limit), 'digested' (listed in the
-- digest row digest_outbox_id), 'cancelled' (recipient removed before delivery).
-- header_message_id is the Message-ID header, fixed when the row is written.
CREATE TABLE outbox (
    id                INTEGER PRIMARY KEY,
    message_id        INTEGER NOT NULL REFERENCES mail_messages(id),
    recipient_id      INTEGER REFERENCES recipients(id) ON DELETE SET NULL,
    to_address        TEXT NOT NULL,
    to_name           TEXT NOT NULL DEFAULT '',
    header_message_id TEXT NOT NULL UNIQUE,
    status            TEXT NOT NULL CHECK (status IN ('pending', 'sent', 'failed', 'digest', 'digested', 'cancelled')),
    attempts          INTEGER NOT NULL DEFAULT 0,
    next_attempt_at   TEXT NOT NULL,
    lease_owner       TEXT,
    lease_until       TEXT,
    last_error        TEXT,
    digest_outbox_id  INTEGER REFERENCES outbox(id),
    created_at        TEXT NOT NULL,
    sent_at           TEXT
);
CREATE INDEX outbox_due ON outbox (status, next_attempt_at);
CREATE INDEX outbox_by_recipient ON outbox (recipient_id, created_at);

-- One row per daily digest slot that has been processed (by any worker).
CREATE TABLE digest_runs (
    scheduled_for TEXT PRIMARY KEY,
    ran_at        TEXT NOT NULL,
    n_digests     INTEGER NOT NULL
);

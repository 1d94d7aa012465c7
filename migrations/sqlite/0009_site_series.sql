-- Time series of a site (river stage, rainfall, air or ground temperature, or
-- a named quantity with its unit), shown beside the lines' epochs. Times are
-- UTC, stored as RFC 3339 text with millisecond precision.
--
-- Every upload is kept verbatim (gzip) before parsing, like raw_uploads for
-- epochs. A sample is unique per series and time: re-sending the same value
-- changes nothing; a different value replaces the stored one, and the old
-- value is kept in site_series_revisions.

CREATE TABLE site_series (
    id         INTEGER PRIMARY KEY,
    site_id    INTEGER NOT NULL REFERENCES sites(id),
    kind       TEXT NOT NULL,
    unit       TEXT NOT NULL,
    created_at TEXT NOT NULL,
    UNIQUE (site_id, kind)
);

CREATE TABLE site_series_uploads (
    id           INTEGER PRIMARY KEY,
    site_id      INTEGER NOT NULL REFERENCES sites(id),
    kind         TEXT NOT NULL,
    received_at  TEXT NOT NULL,
    source       TEXT NOT NULL,
    actor        TEXT NOT NULL,
    filename     TEXT,
    content_type TEXT NOT NULL,
    query        TEXT NOT NULL DEFAULT '',
    sha256       TEXT NOT NULL,
    size_bytes   INTEGER NOT NULL,
    body_gz      BLOB NOT NULL,
    status       TEXT NOT NULL CHECK (status IN ('received', 'accepted', 'rejected')),
    error        TEXT,
    n_added      INTEGER NOT NULL DEFAULT 0,
    n_unchanged  INTEGER NOT NULL DEFAULT 0,
    n_replaced   INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX site_series_uploads_by_site ON site_series_uploads (site_id, received_at);

CREATE TABLE site_series_samples (
    series_id INTEGER NOT NULL REFERENCES site_series(id),
    at        TEXT NOT NULL,
    value     REAL NOT NULL,
    upload_id INTEGER NOT NULL REFERENCES site_series_uploads(id),
    PRIMARY KEY (series_id, at)
);

CREATE TABLE site_series_revisions (
    id            INTEGER PRIMARY KEY,
    series_id     INTEGER NOT NULL REFERENCES site_series(id),
    at            TEXT NOT NULL,
    old_value     REAL NOT NULL,
    new_value     REAL NOT NULL,
    old_upload_id INTEGER NOT NULL REFERENCES site_series_uploads(id),
    upload_id     INTEGER NOT NULL REFERENCES site_series_uploads(id)
);
CREATE INDEX site_series_revisions_by_series ON site_series_revisions (series_id, at);

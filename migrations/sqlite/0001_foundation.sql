-- Sites, lines, electrodes, sequences, tokens, raw uploads, epochs and readings.
-- Times are UTC, stored as RFC 3339 text with millisecond precision.

CREATE TABLE sites (
    id          INTEGER PRIMARY KEY,
    name        TEXT NOT NULL UNIQUE,
    description TEXT NOT NULL DEFAULT '',
    created_at  TEXT NOT NULL
);

CREATE TABLE lines (
    id                  INTEGER PRIMARY KEY,
    site_id             INTEGER NOT NULL REFERENCES sites(id),
    name                TEXT NOT NULL UNIQUE,
    orientation         TEXT NOT NULL CHECK (orientation IN ('longitudinal', 'transverse')),
    expected_interval_s INTEGER NOT NULL CHECK (expected_interval_s > 0),
    notes               TEXT NOT NULL DEFAULT '',
    created_at          TEXT NOT NULL
);

CREATE TABLE electrodes (
    id         INTEGER PRIMARY KEY,
    line_id    INTEGER NOT NULL REFERENCES lines(id),
    position   INTEGER NOT NULL,
    label      TEXT NOT NULL,
    x          REAL NOT NULL,
    z          REAL NOT NULL,
    easting    REAL,
    northing   REAL,
    in_service INTEGER NOT NULL DEFAULT 1,
    UNIQUE (line_id, position),
    UNIQUE (line_id, label)
);

CREATE TABLE electrode_service (
    id           INTEGER PRIMARY KEY,
    electrode_id INTEGER NOT NULL REFERENCES electrodes(id),
    in_service   INTEGER NOT NULL,
    changed_at   TEXT NOT NULL,
    actor        TEXT NOT NULL,
    reason       TEXT NOT NULL DEFAULT ''
);
CREATE INDEX electrode_service_by_electrode ON electrode_service (electrode_id, changed_at);

CREATE TABLE sequences (
    id            INTEGER PRIMARY KEY,
    line_id       INTEGER NOT NULL REFERENCES lines(id),
    name          TEXT NOT NULL,
    version       INTEGER NOT NULL,
    n_quadrupoles INTEGER NOT NULL,
    created_at    TEXT NOT NULL,
    UNIQUE (line_id, version)
);

-- Electrodes are referred to by their position (cable order, 0-based) on the line;
-- b and n are NULL for a remote electrode.
CREATE TABLE sequence_quadrupoles (
    sequence_id INTEGER NOT NULL REFERENCES sequences(id),
    position    INTEGER NOT NULL,
    a           INTEGER NOT NULL,
    b           INTEGER,
    m           INTEGER NOT NULL,
    n           INTEGER,
    reciprocal  INTEGER,
    PRIMARY KEY (sequence_id, position)
);

CREATE TABLE line_tokens (
    id           INTEGER PRIMARY KEY,
    line_id      INTEGER NOT NULL REFERENCES lines(id),
    token_hash   TEXT NOT NULL UNIQUE,
    label        TEXT NOT NULL DEFAULT '',
    created_at   TEXT NOT NULL,
    revoked_at   TEXT,
    last_used_at TEXT
);

-- Every upload that passed authentication, verbatim (gzip), before parsing.
CREATE TABLE raw_uploads (
    id           INTEGER PRIMARY KEY,
    line_id      INTEGER NOT NULL REFERENCES lines(id),
    received_at  TEXT NOT NULL,
    source       TEXT NOT NULL,
    filename     TEXT,
    content_type TEXT NOT NULL,
    query        TEXT NOT NULL DEFAULT '',
    sha256       TEXT NOT NULL,
    size_bytes   INTEGER NOT NULL,
    body_gz      BLOB NOT NULL,
    status       TEXT NOT NULL CHECK (status IN ('received', 'accepted', 'duplicate', 'rejected')),
    error        TEXT,
    epoch_id     INTEGER
);
CREATE INDEX raw_uploads_by_line ON raw_uploads (line_id, received_at);

CREATE TABLE epochs (
    id            INTEGER PRIMARY KEY,
    line_id       INTEGER NOT NULL REFERENCES lines(id),
    sequence_id   INTEGER NOT NULL REFERENCES sequences(id),
    started_at    TEXT NOT NULL,
    finished_at   TEXT,
    meter_id      TEXT,
    received_at   TEXT NOT NULL,
    status        TEXT NOT NULL,
    content_hash  TEXT NOT NULL,
    n_readings    INTEGER NOT NULL,
    raw_upload_id INTEGER NOT NULL REFERENCES raw_uploads(id),
    UNIQUE (line_id, started_at)
);

CREATE TABLE epoch_temperatures (
    epoch_id      INTEGER NOT NULL REFERENCES epochs(id),
    depth_m       REAL NOT NULL,
    temperature_c REAL NOT NULL,
    PRIMARY KEY (epoch_id, depth_m)
);

-- One row per reading; raw values are never changed after insert.
CREATE TABLE readings (
    epoch_id        INTEGER NOT NULL REFERENCES epochs(id),
    row_index       INTEGER NOT NULL,
    quad            INTEGER NOT NULL,
    current_ma      REAL,
    voltage_mv      REAL,
    resistance_ohm  REAL NOT NULL,
    stack_error_pct REAL,
    contact_a_ohm   REAL,
    contact_b_ohm   REAL,
    PRIMARY KEY (epoch_id, row_index)
);

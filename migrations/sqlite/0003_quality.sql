-- Outcome of quality control. Raw readings are never changed: these tables say,
-- per reading, whether it was kept and why not; per epoch, the share dropped by
-- each rule and the fitted error model; per electrode and epoch, its health.

CREATE TABLE epoch_quality (
    epoch_id          INTEGER PRIMARY KEY REFERENCES epochs(id),
    processed_at      TEXT NOT NULL,
    n_readings        INTEGER NOT NULL,
    n_dropped         INTEGER NOT NULL,
    dropped_share     REAL NOT NULL,
    rule_counts       TEXT NOT NULL,
    flagged           TEXT NOT NULL,
    median_rho_a      REAL,
    error_a_ohm       REAL NOT NULL,
    error_b           REAL NOT NULL,
    error_fitted      INTEGER NOT NULL,
    error_pairs       INTEGER NOT NULL,
    warnings          TEXT NOT NULL
);

CREATE TABLE reading_quality (
    epoch_id         INTEGER NOT NULL REFERENCES epochs(id),
    row_index        INTEGER NOT NULL,
    quad             INTEGER NOT NULL,
    kept             INTEGER NOT NULL,
    k_factor         REAL,
    rho_a            REAL,
    reciprocal_error REAL,
    spike_score      REAL,
    rules            TEXT NOT NULL,
    reasons          TEXT NOT NULL,
    PRIMARY KEY (epoch_id, row_index)
);

CREATE TABLE electrode_quality (
    epoch_id          INTEGER NOT NULL REFERENCES epochs(id),
    position          INTEGER NOT NULL,
    in_service        INTEGER NOT NULL,
    n_readings        INTEGER NOT NULL,
    n_failing         INTEGER NOT NULL,
    fail_share        REAL,
    contact_ohm       REAL,
    flags             TEXT NOT NULL,
    consecutive_flags INTEGER NOT NULL,
    PRIMARY KEY (epoch_id, position)
);

CREATE TABLE quality_events (
    id          INTEGER PRIMARY KEY,
    line_id     INTEGER NOT NULL REFERENCES lines(id),
    epoch_id    INTEGER REFERENCES epochs(id),
    kind        TEXT NOT NULL,
    detail      TEXT NOT NULL,
    occurred_at TEXT NOT NULL,
    created_at  TEXT NOT NULL
);
CREATE INDEX quality_events_by_line ON quality_events (line_id, occurred_at);
CREATE INDEX epochs_by_status ON epochs (line_id, status, started_at);

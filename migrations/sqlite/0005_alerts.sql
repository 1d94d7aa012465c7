-- Change zones and alerts. The zone tracker and alert engine of each line are
-- stored as one JSON document with a version (optimistic concurrency between
-- the processing job and people acknowledging). Alerts and their transitions
-- are the durable record (audit trail); zones are stored per epoch.

CREATE TABLE line_monitors (
    line_id        INTEGER PRIMARY KEY REFERENCES lines(id),
    state          TEXT NOT NULL,
    version        INTEGER NOT NULL,
    last_epoch_id  INTEGER REFERENCES epochs(id),
    last_time      TEXT,
    updated_at     TEXT NOT NULL
);

CREATE TABLE epoch_zones (
    id              INTEGER PRIMARY KEY,
    epoch_id        INTEGER NOT NULL REFERENCES epochs(id),
    line_id         INTEGER NOT NULL REFERENCES lines(id),
    track           INTEGER NOT NULL,
    direction       TEXT NOT NULL,
    level           INTEGER,
    area_m2         REAL NOT NULL,
    x_min           REAL NOT NULL,
    x_max           REAL NOT NULL,
    depth_top       REAL NOT NULL,
    depth_bottom    REAL NOT NULL,
    centroid_x      REAL NOT NULL,
    centroid_z      REAL NOT NULL,
    mean_change_pct REAL NOT NULL,
    peak_change_pct REAL NOT NULL,
    peak_judged_pct REAL NOT NULL,
    good_share      REAL NOT NULL,
    outline         TEXT NOT NULL,
    cells           TEXT NOT NULL
);
CREATE INDEX epoch_zones_epoch ON epoch_zones (epoch_id);
CREATE INDEX epoch_zones_track ON epoch_zones (line_id, track);

-- Line-wide observations of each processed epoch (wetting notice, warnings).
CREATE TABLE epoch_monitoring (
    epoch_id        INTEGER PRIMARY KEY REFERENCES epochs(id),
    line_id         INTEGER NOT NULL REFERENCES lines(id),
    wetting         TEXT,
    warnings        TEXT NOT NULL,
    created_at      TEXT NOT NULL
);

CREATE TABLE alerts (
    id              INTEGER PRIMARY KEY,
    line_id         INTEGER NOT NULL REFERENCES lines(id),
    engine_id       INTEGER NOT NULL,
    subject         TEXT NOT NULL,
    subject_kind    TEXT NOT NULL,
    track           INTEGER,
    state           TEXT NOT NULL CHECK (state IN ('raised', 'acknowledged', 'resolved')),
    level           INTEGER NOT NULL,
    level_label     TEXT NOT NULL,
    raised_at       TEXT NOT NULL,
    since           TEXT NOT NULL,
    updated_at      TEXT NOT NULL,
    resolved_at     TEXT,
    epoch_id        INTEGER REFERENCES epochs(id),
    x_min           REAL,
    x_max           REAL,
    depth_top       REAL,
    depth_bottom    REAL,
    peak_change_pct REAL,
    area_m2         REAL,
    detail          TEXT NOT NULL,
    UNIQUE (line_id, engine_id)
);
CREATE INDEX alerts_state ON alerts (state, line_id);

CREATE TABLE alert_transitions (
    id          INTEGER PRIMARY KEY,
    alert_id    INTEGER NOT NULL REFERENCES alerts(id),
    from_state  TEXT,
    to_state    TEXT NOT NULL,
    level       INTEGER NOT NULL,
    reason      TEXT NOT NULL,
    actor       TEXT NOT NULL,
    note        TEXT,
    epoch_id    INTEGER REFERENCES epochs(id),
    at          TEXT NOT NULL
);
CREATE INDEX alert_transitions_alert ON alert_transitions (alert_id);

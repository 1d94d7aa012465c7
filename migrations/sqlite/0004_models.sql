-- Inversion results. A line's section (the polygons its models live on) is
-- stored once per geometry; every model and change refers to it. Per-cell
-- values are little-endian f64 arrays (masks: one byte per cell).

CREATE TABLE line_sections (
    id          INTEGER PRIMARY KEY,
    line_id     INTEGER NOT NULL REFERENCES lines(id),
    geometry_hash TEXT NOT NULL,
    polygons    TEXT NOT NULL,
    depths      BLOB NOT NULL,
    created_at  TEXT NOT NULL,
    UNIQUE (line_id, geometry_hash)
);

-- A line's baseline: the epochs whose median forms the reference state.
CREATE TABLE line_baselines (
    id          INTEGER PRIMARY KEY,
    line_id     INTEGER NOT NULL REFERENCES lines(id),
    sequence_id INTEGER NOT NULL REFERENCES sequences(id),
    section_id  INTEGER NOT NULL REFERENCES line_sections(id),
    epoch_ids   TEXT NOT NULL,
    chosen_by   TEXT NOT NULL,
    active      INTEGER NOT NULL,
    model       BLOB,
    chi2        REAL,
    rms_pct     REAL,
    lambda      REAL,
    created_at  TEXT NOT NULL
);
CREATE INDEX line_baselines_line ON line_baselines (line_id, active);

CREATE TABLE epoch_models (
    epoch_id      INTEGER PRIMARY KEY REFERENCES epochs(id),
    line_id       INTEGER NOT NULL REFERENCES lines(id),
    section_id    INTEGER NOT NULL REFERENCES line_sections(id),
    model         BLOB NOT NULL,
    corrected     BLOB NOT NULL,
    coverage      BLOB NOT NULL,
    mask          BLOB NOT NULL,
    chi2          REAL NOT NULL,
    rms_pct       REAL NOT NULL,
    iterations    INTEGER NOT NULL,
    lambda        REAL NOT NULL,
    converged     INTEGER NOT NULL,
    n_used        INTEGER NOT NULL,
    temperature   TEXT NOT NULL,
    warnings      TEXT NOT NULL,
    seconds       REAL NOT NULL,
    created_at    TEXT NOT NULL
);
CREATE INDEX epoch_models_line ON epoch_models (line_id);

CREATE TABLE epoch_changes (
    epoch_id      INTEGER NOT NULL REFERENCES epochs(id),
    mode          TEXT NOT NULL CHECK (mode IN ('ratio', 'difference')),
    line_id       INTEGER NOT NULL REFERENCES lines(id),
    baseline_id   INTEGER NOT NULL REFERENCES line_baselines(id),
    section_id    INTEGER NOT NULL REFERENCES line_sections(id),
    change_pct    BLOB NOT NULL,
    mask          BLOB NOT NULL,
    chi2          REAL NOT NULL,
    rms_pct       REAL NOT NULL,
    iterations    INTEGER NOT NULL,
    converged     INTEGER NOT NULL,
    strongest_drop_pct REAL NOT NULL,
    strongest_rise_pct REAL NOT NULL,
    warnings      TEXT NOT NULL,
    seconds       REAL NOT NULL,
    created_at    TEXT NOT NULL,
    PRIMARY KEY (epoch_id, mode)
);
CREATE INDEX epoch_changes_line ON epoch_changes (line_id, mode);

-- Extra ground-surface points of a line beyond its electrodes (e.g. the toes
-- of a levee cross-section), so the mesh follows the real topography.
CREATE TABLE surface_points (
    line_id  INTEGER NOT NULL REFERENCES lines(id),
    x        REAL NOT NULL,
    z        REAL NOT NULL,
    PRIMARY KEY (line_id, x)
);

-- Why an epoch could not be processed (status 'failed'); kept for review.
CREATE TABLE epoch_failures (
    epoch_id  INTEGER PRIMARY KEY REFERENCES epochs(id),
    stage     TEXT NOT NULL,
    message   TEXT NOT NULL,
    failed_at TEXT NOT NULL
);

-- Per-line alert rules, edited by admins: one JSON document of the rule set
-- (levels, persistence, hysteresis, lateral contrast, noise, rate, rise,
-- seasonal and data-quality rules) with a version counted up on every change
-- and who changed it when. A line without a row uses the default rules.
-- The noise calibration of a line's baseline is cached beside it: σ per cell
-- measured over the baseline epochs' change sections, with what it was
-- computed from (`basis`: mode and lateral-contrast settings) so a change of
-- either computes it again.

CREATE TABLE line_rules (
    line_id     INTEGER PRIMARY KEY REFERENCES lines(id),
    rules       TEXT NOT NULL,
    version     INTEGER NOT NULL,
    updated_by  TEXT NOT NULL,
    updated_at  TEXT NOT NULL
);

CREATE TABLE line_noise (
    line_id     INTEGER NOT NULL REFERENCES lines(id),
    baseline_id INTEGER NOT NULL REFERENCES line_baselines(id),
    basis       TEXT NOT NULL,
    epoch_ids   TEXT NOT NULL,
    sigma       TEXT NOT NULL,
    created_at  TEXT NOT NULL,
    PRIMARY KEY (line_id, baseline_id)
);

-- Durable processing jobs. A job is identified by its key (e.g. 'qc:line:7'):
-- enqueuing a key that is already queued does nothing; one that is running is
-- marked to run again when it finishes; one that is done or dead is queued anew.
-- Workers claim due jobs with a lease and extend it while they work; a job whose
-- lease expired is claimed again.

CREATE TABLE jobs (
    id           INTEGER PRIMARY KEY,
    key          TEXT NOT NULL UNIQUE,
    kind         TEXT NOT NULL,
    payload      TEXT NOT NULL DEFAULT '{}',
    state        TEXT NOT NULL CHECK (state IN ('queued', 'running', 'done', 'dead')),
    priority     INTEGER NOT NULL DEFAULT 0,
    attempts     INTEGER NOT NULL DEFAULT 0,
    max_attempts INTEGER NOT NULL DEFAULT 5,
    rerun        INTEGER NOT NULL DEFAULT 0,
    run_after    TEXT NOT NULL,
    lease_until  TEXT,
    worker       TEXT,
    last_error   TEXT,
    created_at   TEXT NOT NULL,
    started_at   TEXT,
    finished_at  TEXT
);
CREATE INDEX jobs_due ON jobs (state, run_after);

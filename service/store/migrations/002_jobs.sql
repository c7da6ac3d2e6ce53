-- Background fit jobs (service/jobs): the same table as the local store's SQLite index. A job is owned by the
-- server process that runs it ('owner'), which refreshes 'heartbeat_at' while the job is queued or running; any
-- replica marks a job whose owner stopped refreshing it as failed.
CREATE TABLE jobs (
    seq BIGSERIAL PRIMARY KEY,          -- orders the list (newest first)
    id TEXT NOT NULL UNIQUE,
    segmentation TEXT NOT NULL,
    state TEXT NOT NULL,                -- queued, running, done, failed, cancelled
    step TEXT NOT NULL,
    progress DOUBLE PRECISION NOT NULL,
    version INTEGER,
    error TEXT,                         -- JSON: the 'detail' a synchronous fit would have answered
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL,
    owner TEXT NOT NULL,
    heartbeat_at TEXT NOT NULL,
    actor TEXT NOT NULL
);
CREATE INDEX jobs_by_segmentation ON jobs (segmentation, seq);
CREATE INDEX jobs_active ON jobs (state, heartbeat_at);

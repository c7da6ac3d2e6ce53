-- The index of the postgres backend: the same tables as the local store's SQLite index
-- (service/store/filesystem.py), artifacts referenced by their SHA-256 (service/store/objects.py).
-- Timestamps are ISO-8601 UTC text, as in the local index, so both backends answer the same strings.
CREATE TABLE segmentations (
    name TEXT PRIMARY KEY,
    live_version INTEGER,
    last_version INTEGER NOT NULL DEFAULT 0,
    created_at TEXT NOT NULL,
    updated_at TEXT NOT NULL
);
CREATE TABLE versions (
    name TEXT NOT NULL REFERENCES segmentations(name),
    version INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    k INTEGER NOT NULL,
    n_records BIGINT NOT NULL,
    data_sha256 TEXT NOT NULL,
    bundle_sha256 TEXT NOT NULL,        -- the serving artifact (objects/<sha[:2]>/<sha>.npz)
    fitted_sha256 TEXT NOT NULL,        -- the fitted scikit-learn objects, for analysts (never read by the server)
    artifact TEXT NOT NULL,
    report TEXT NOT NULL,               -- JSON
    PRIMARY KEY (name, version)
);
CREATE TABLE labels (
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    segment INTEGER NOT NULL,
    label TEXT,
    PRIMARY KEY (name, version, segment)
);
CREATE TABLE drift_reports (
    seq BIGSERIAL PRIMARY KEY,
    id TEXT NOT NULL UNIQUE,
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    created_at TEXT NOT NULL,
    report TEXT NOT NULL
);
CREATE INDEX drift_by_name ON drift_reports (name, version, seq);
CREATE INDEX drift_by_time ON drift_reports (created_at);
CREATE TABLE api_keys (
    name TEXT PRIMARY KEY,
    prefix TEXT NOT NULL,
    salt BYTEA NOT NULL,
    digest BYTEA NOT NULL,              -- HMAC-SHA256(salt, key); the key itself is never stored
    scopes TEXT NOT NULL,               -- JSON list
    created_at TEXT NOT NULL,
    created_by TEXT NOT NULL
);
CREATE TABLE counters (
    name TEXT PRIMARY KEY,              -- 'keys' and 'changes', polled by running servers
    value BIGINT NOT NULL
);
CREATE TABLE events (
    seq BIGSERIAL PRIMARY KEY,
    at TEXT NOT NULL,
    actor TEXT NOT NULL,
    action TEXT NOT NULL,
    name TEXT,
    version INTEGER,
    details TEXT NOT NULL
);
CREATE INDEX events_by_name ON events (name, seq);

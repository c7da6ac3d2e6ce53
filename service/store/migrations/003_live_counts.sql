-- Live drift counts (service/live/): per version and time bucket, counts on the version's training bins,
-- one row per counter ("slot"). Replicas add their counts with an upsert, so a bucket is the sum over
-- replicas. Only counts are stored, never a record value.
CREATE TABLE live_counts (
    name TEXT NOT NULL,
    version INTEGER NOT NULL,
    bucket_start BIGINT NOT NULL,       -- unix seconds, a multiple of bucket_seconds
    bucket_seconds INTEGER NOT NULL,
    slot INTEGER NOT NULL,              -- a counter of the version's layout (service/live/counts.py)
    count BIGINT NOT NULL,
    PRIMARY KEY (name, version, bucket_start, bucket_seconds, slot)
);
CREATE INDEX live_counts_by_time ON live_counts (bucket_start);

-- beat_strip: the digest (beat_strip_digest.sql) of the wave events each beat_pattern row was
-- computed from. Grain: one row per ecg_key of beat_pattern. When wave_event changes, only
-- strips whose digest differs (or that are new) are classified again; beat_run says whether
-- the beat rules and the classifier are still those the stored rows came from.
CREATE OR REPLACE TABLE beat_strip (
    ecg_key VARCHAR NOT NULL,
    digest  VARCHAR NOT NULL
);

-- beat_run: what the current beat_pattern rows were computed from (one row). The phenotype
-- stage reuses beat_pattern while wave_event, the beat rules and the classifier are unchanged
-- (cohort/phenotype/beats_batch.py refresh_registry); `dromos phenotype --rebuild` recomputes.
CREATE OR REPLACE TABLE beat_run (
    rules_id               VARCHAR NOT NULL,
    rules_fingerprint      VARCHAR NOT NULL,  -- sha256 of every threshold of the beat rules
    classifier_fingerprint VARCHAR NOT NULL,  -- sha256 of the classifier's source files
    wave_events            BIGINT NOT NULL,
    wave_fingerprint       VARCHAR NOT NULL,  -- wave_fingerprint.sql
    n_strips               BIGINT NOT NULL,
    written_at             TIMESTAMP NOT NULL
);

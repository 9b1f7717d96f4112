-- Staged records whose content hash the classification compares: clean records whose key is
-- repeated in the file (stage_repeats) or already in the registry (stage_refs.registry_hash).
-- Grain: one row per such record (few). Output: temp table stage_content_needed (row_k, position:
-- the record's storage position in stage_typed, which the per-table content statements join on).
-- The session variable dromos_keys_repeat (set by the loader) is false when stage_repeats is
-- empty, the usual case: the filter then folds away and no key is hashed again.
CREATE OR REPLACE TEMP TABLE stage_content_needed AS
SELECT s.row_k, s.position
FROM stage_checked AS s
WHERE len(s.problems) = 0
  AND ((getvariable('dromos_keys_repeat') AND s.key_hash IN (SELECT key_hash FROM stage_repeats))
       OR s.row_k IN (SELECT row_k FROM stage_refs WHERE registry_hash IS NOT NULL));

-- statement_combo: the distinct (statements, statement_codes) pairs of all reads in `ecg`
-- (machine and confirmed) and how many reads carry each. Grain: one row per distinct pair.
-- Run once per phenotype run into a temporary table: the lexicon's distinct statements and
-- codes and statement_profile.sql all start from it (machine statements repeat heavily, so it
-- is small), and the list columns of `ecg` are grouped once instead of three times.
SELECT statements, statement_codes, count(*) AS n_reads
FROM ecg
GROUP BY statements, statement_codes

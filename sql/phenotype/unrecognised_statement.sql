-- unrecognised_statement: statements and statement codes the lexicon could not fully read, so
-- a user can extend the lexicon. n counts the reads in `ecg` (machine and confirmed) carrying
-- the statement. whole = true when no part of the statement was recognised.
-- Grain: one row per (kind, statement) for rule set $rule_set_id.
WITH
profile AS (
    SELECT statements, statement_codes, n_reads
    FROM statement_profile
    WHERE rule_set_id = $rule_set_id AND has_unrecognised
),
items AS (
    SELECT 'statement' AS kind, unnest(statements) AS text, n_reads FROM profile
    UNION ALL
    SELECT 'code' AS kind, unnest(statement_codes) AS text, n_reads FROM profile
),
classed AS (
    SELECT kind, text, unrecognised_part, rule = 'unrecognised:whole' AS whole
    FROM statement_class
    WHERE rule_set_id = $rule_set_id AND finding = 'unrecognised'
)
SELECT
    $rule_set_id AS rule_set_id,
    i.kind,
    i.text AS statement,
    c.unrecognised_part,
    c.whole,
    sum(i.n_reads) AS n
FROM items AS i
JOIN classed AS c ON c.kind = i.kind AND c.text = i.text
GROUP BY i.kind, i.text, c.unrecognised_part, c.whole

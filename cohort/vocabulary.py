"""Category codes shared by every stage (registry values, rule files, tables, reports).

Codes are short snake_case strings stored in the registry; labels are what reports show.
One place for them, so the generator's truth, the phenotype rules, the beat classifier and the
statistics agree on spelling.
"""

from __future__ import annotations

RHYTHM_CLASSES: dict[str, str] = {
    "sinus": "Sinus rhythm",
    "atrial_fibrillation": "Atrial fibrillation",
    "atrial_flutter": "Atrial flutter",
    "junctional": "Junctional rhythm",
    "paced": "Paced rhythm",
    "other": "Other rhythm",
}

# AV conduction category of one ECG, with its ordinal grade (higher = more severe block).
# Grade None: no AV grade can be given (PR not assessable, or dissociation without block).
AV_CATEGORIES: dict[str, str] = {
    "short_pr": "Short PR",
    "normal_pr": "Normal PR",
    "first_degree": "First-degree AV block",
    "marked_first_degree": "Marked first-degree AV block",
    "mobitz_i": "Second-degree AV block, Mobitz I",
    "mobitz_ii": "Second-degree AV block, Mobitz II",
    "two_to_one": "Second-degree AV block, 2:1",
    "high_grade": "High-grade AV block",
    "third_degree": "Third-degree AV block",
    "av_dissociation": "AV dissociation",
    "not_assessable": "AV conduction not assessable",
}

AV_GRADE: dict[str, int | None] = {
    "short_pr": 0,
    "normal_pr": 0,
    "first_degree": 1,
    "marked_first_degree": 1,
    "mobitz_i": 2,
    "mobitz_ii": 3,
    "two_to_one": 3,
    "high_grade": 4,
    "third_degree": 5,
    "av_dissociation": None,
    "not_assessable": None,
}

VENTRICULAR_CONDUCTION: dict[str, str] = {
    "normal": "Normal ventricular conduction",
    "incomplete_rbbb": "Incomplete RBBB",
    "rbbb": "Right bundle branch block",
    "incomplete_lbbb": "Incomplete LBBB",
    "lbbb": "Left bundle branch block",
    "lafb": "Left anterior fascicular block",
    "lpfb": "Left posterior fascicular block",
    "bifascicular": "Bifascicular block",
    "nonspecific_ivcd": "Nonspecific intraventricular conduction delay",
    "paced": "Ventricular paced",
    "not_assessable": "Ventricular conduction not assessable",
}

# Pattern decided from beat-level P and QRS onset times (cohort.phenotype.beats).
BEAT_PATTERNS: dict[str, str] = {
    "normal": "Normal AV conduction",
    "first_degree": "First-degree AV block",
    "mobitz_i": "Second-degree AV block, Mobitz I",
    "mobitz_ii": "Second-degree AV block, Mobitz II",
    "two_to_one": "Second-degree AV block, 2:1",
    "high_grade": "High-grade AV block",
    "third_degree": "Third-degree AV block",
    "blocked_pac": "Blocked premature atrial complexes (not AV block)",
    "av_dissociation": "AV dissociation without block",
    "indeterminate": "Indeterminate",
}

SEXES: dict[str, str] = {"F": "Female", "M": "Male", "U": "Unknown"}

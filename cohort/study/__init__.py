"""Study layer: study specs (TOML), cohort frames, analysis kinds and runs.

``load_spec(path)`` validates a spec; ``build_cohort(con, spec, variant)`` returns the study
frames of one variant; ``run_spec(spec, db, out_dir)`` runs every analysis of every variant
and writes the tables. New analysis kinds are added with ``register_kind``.
"""

from cohort.study.analyses import ANALYSIS_KINDS, AnalysisContext, AnalysisKind, register_kind
from cohort.study.builder import StudyFrames, build_cohort
from cohort.study.run import RunResult, run_spec
from cohort.study.spec import Spec, load_spec, parse_spec

# Registers the survival and competing-risks analysis kinds (kaplan_meier, cox, ...).
from cohort.study import survival_kinds  # noqa: E402, F401  isort: skip
# Registers the site quality kind (rates per site and period, funnel and u-chart data).
from cohort.study import quality_kinds  # noqa: E402, F401  isort: skip

__all__ = [
    "ANALYSIS_KINDS",
    "AnalysisContext",
    "AnalysisKind",
    "RunResult",
    "Spec",
    "StudyFrames",
    "build_cohort",
    "load_spec",
    "parse_spec",
    "register_kind",
    "run_spec",
]

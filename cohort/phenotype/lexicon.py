"""Statement lexicon: normalize free-text ECG statements and classify them into findings.

The lexicon is data (``cohort/rules/lexicon-v1.toml``): substitutions, negation and uncertainty
cues, and ordered regex patterns. Each distinct statement of a registry is classified once (the
same machine statements repeat across millions of ECGs), and the SQL joins the result back.
A classification never raises on odd input: anything not understood is reported as the
``unrecognised_part`` so users can extend the lexicon.
"""

from __future__ import annotations

import re
import tomllib
import unicodedata
from dataclasses import dataclass
from functools import cache
from pathlib import Path

from cohort.errors import RuleSetError

# Finding codes the phenotype SQL understands (see the header of lexicon-v1.toml).
FINDINGS: tuple[str, ...] = (
    "rhythm:sinus",
    "rhythm:atrial_fibrillation",
    "rhythm:atrial_flutter",
    "rhythm:junctional",
    "rhythm:paced_atrial",
    "rhythm:paced_ventricular",
    "rhythm:ventricular",
    "rhythm:other",
    "av:short_pr",
    "av:first_degree",
    "av:marked_first_degree",
    "av:second_degree",
    "av:mobitz_i",
    "av:mobitz_ii",
    "av:two_to_one",
    "av:high_grade",
    "av:third_degree",
    "av:av_dissociation",
    "av:block_unspecified",
    "av:none",
    "vc:rbbb",
    "vc:incomplete_rbbb",
    "vc:lbbb",
    "vc:incomplete_lbbb",
    "vc:lafb",
    "vc:lpfb",
    "vc:bifascicular",
    "vc:nonspecific_ivcd",
    "vc:bbb_unspecified",
    "vc:none",
    "ctx:preexcitation",
    "ctx:rv_hypertrophy",
    "ctx:lateral_infarct",
    "ctx:dextrocardia",
    "ctx:blocked_pac",
    "ctx:left_axis_deviation",
    "ctx:right_axis_deviation",
    "global:normal",
    "other",
)
CERTAIN, UNCERTAIN = "certain", "uncertain"

_KEEP = re.compile(r"[^\w,;:?\s]", re.UNICODE)
_SPACES = re.compile(r"\s+")
_SEPARATORS = re.compile(r"\s*([,;])\s*")
_TOKEN = re.compile(r"[\w?]+", re.UNICODE)


@dataclass(frozen=True)
class Finding:
    """One finding read from a statement: code, certainty, negation and the lexicon rule id."""

    code: str
    certainty: str
    negated: bool
    rule: str


@dataclass(frozen=True)
class Classification:
    """Result for one statement (or statement code)."""

    text: str
    normalized: str
    findings: tuple[Finding, ...]
    unrecognised_part: str | None

    @property
    def recognised(self) -> bool:
        """True when every part of the statement was understood."""
        return self.unrecognised_part is None


@dataclass(frozen=True)
class _Pattern:
    id: str
    regex: re.Pattern
    findings: tuple[str, ...]

    @property
    def is_other(self) -> bool:
        return self.findings == ("other",)


def _cue_regex(cues: list[str]) -> re.Pattern:
    """One regex matching any cue as whole words (longest first so phrases win)."""
    parts = sorted((re.escape(c.strip()) for c in cues), key=len, reverse=True)
    return re.compile(r"(?<![\w])(?:" + "|".join(parts) + r")(?![\w])")


class Lexicon:
    """Compiled statement lexicon. Build with :func:`load_lexicon`."""

    def __init__(self, data: dict, path: Path):
        self.path = path
        self.id = data["lexicon"]["id"]
        norm, cues = data["normalize"], data["cues"]
        self._pre = [self._compile(rx, f"normalize.pre {rx!r}") for rx, _ in norm["pre"]]
        self._pre_rep = [rep for _, rep in norm["pre"]]
        self._abbr = [self._compile(rx, f"normalize.abbreviations {rx!r}") for rx, _ in norm["abbreviations"]]
        self._abbr_rep = [rep for _, rep in norm["abbreviations"]]
        self._breaks = tuple(cues["clause_breaks"])
        self._neg_before = _cue_regex(cues["negation_before"])
        self._neg_after = _cue_regex(cues["negation_after"])
        self._unc_before = _cue_regex(cues["uncertainty_before"])
        self._unc_after = _cue_regex(cues["uncertainty_after"])
        self._all_cues = _cue_regex(
            cues["negation_before"] + cues["negation_after"]
            + cues["uncertainty_before"] + cues["uncertainty_after"]
        )
        self._filler = frozenset(cues["filler"])
        self.patterns = tuple(self._pattern(p) for p in data["pattern"])
        self._systems = {
            alias.upper(): system for system, aliases in data.get("code_systems", {}).items()
            for alias in aliases
        }
        self.codes = {self._code_key(c["code"]): tuple(c["findings"]) for c in data.get("code", [])}
        self.code_sources = {self._code_key(c["code"]): c.get("source", "") for c in data.get("code", [])}

    def _compile(self, regex: str, where: str) -> re.Pattern:
        try:
            return re.compile(regex)
        except re.error as exc:
            raise RuleSetError(f"bad regex in {self.path} at {where}: {exc}; fix the pattern") from exc

    def _pattern(self, entry: dict) -> _Pattern:
        unknown = [f for f in entry["findings"] if f not in FINDINGS]
        if unknown:
            raise RuleSetError(
                f"pattern '{entry['id']}' in {self.path} has unknown findings {unknown}; "
                f"known findings: {', '.join(FINDINGS)}"
            )
        return _Pattern(entry["id"], self._compile(entry["regex"], f"pattern '{entry['id']}'"),
                        tuple(entry["findings"]))

    # --- normalization -------------------------------------------------------------------
    def normalize(self, text: str) -> str:
        """Case-folded, abbreviation-expanded text with only , ; : ? as punctuation."""
        s = unicodedata.normalize("NFKC", text).casefold()
        for rx, rep in zip(self._pre, self._pre_rep, strict=True):
            s = rx.sub(rep, s)
        s = _KEEP.sub(" ", s.replace("_", " ").replace("?", " ? "))
        s = _SEPARATORS.sub(r"\1 ", s)
        s = _SPACES.sub(" ", s).strip(" ,;")
        for rx, rep in zip(self._abbr, self._abbr_rep, strict=True):
            s = rx.sub(rep, s)
        return _SPACES.sub(" ", s).strip(" ,;")

    # --- classification ------------------------------------------------------------------
    def classify(self, text: str | None) -> Classification:
        """Findings of one free-text statement (never raises on odd text)."""
        raw = "" if text is None else str(text)
        norm = self.normalize(raw)
        if not norm:
            return Classification(raw, norm, (Finding("other", CERTAIN, False, "empty"),), None)
        matches = self._match(norm)
        cue_text = self._blank(norm, [(a, b) for a, b, p in matches if p.is_other])
        breaks = self._break_positions(norm)
        findings: dict[tuple, Finding] = {}
        for start, end, pattern in matches:
            lo, hi = self._clause(breaks, start, end, len(norm))
            negated, uncertain = self._cues(cue_text[lo:start], cue_text[end:hi])
            for code in pattern.findings:
                certainty = UNCERTAIN if uncertain else CERTAIN
                finding = Finding(code, certainty, negated and not uncertain, pattern.id)
                findings.setdefault((code, finding.certainty, finding.negated), finding)
        leftover = self._leftover(self._blank(norm, [(a, b) for a, b, _ in matches]))
        return Classification(raw, norm, tuple(findings.values()), leftover)

    def _match(self, norm: str) -> list[tuple[int, int, _Pattern]]:
        """Spans matched by the patterns in order; a match consumes its span."""
        work = norm
        found = []
        for pattern in self.patterns:
            for m in pattern.regex.finditer(work):
                if m.end() > m.start():
                    found.append((m.start(), m.end(), pattern))
            if found and found[-1][2] is pattern:
                work = self._blank(work, [(a, b) for a, b, p in found if p is pattern])
        return sorted(found, key=lambda t: t[0])

    @staticmethod
    def _blank(text: str, spans: list[tuple[int, int]]) -> str:
        chars = list(text)
        for a, b in spans:
            chars[a:b] = " " * (b - a)
        return "".join(chars)

    def _break_positions(self, norm: str) -> list[tuple[int, int]]:
        spans = []
        for brk in self._breaks:
            start = norm.find(brk)
            while start >= 0:
                spans.append((start, start + len(brk)))
                start = norm.find(brk, start + 1)
        return sorted(spans)

    @staticmethod
    def _clause(breaks: list[tuple[int, int]], start: int, end: int, size: int) -> tuple[int, int]:
        lo = max((b for a, b in breaks if b <= start), default=0)
        hi = min((a for a, b in breaks if a >= end), default=size)
        return lo, hi

    def _cues(self, before: str, after: str) -> tuple[bool, bool]:
        negated = bool(self._neg_before.search(before) or self._neg_after.search(after))
        uncertain = bool(self._unc_before.search(before) or self._unc_after.search(after))
        return negated, uncertain

    def _leftover(self, text: str) -> str | None:
        """Meaningful words not explained by any pattern, cue or filler word."""
        text = self._all_cues.sub(" ", text)
        words = [
            w for w in _TOKEN.findall(text)
            if w not in self._filler and len(w) > 1 and not w.isdigit()
        ]
        return " ".join(words) if words else None

    # --- statement codes -----------------------------------------------------------------
    def _code_key(self, code: str) -> str:
        system, sep, value = str(code).strip().rpartition(":")
        if not sep:
            return value.upper()
        canonical = self._systems.get(system.strip().upper(), system.strip().upper())
        return f"{canonical}:{value.strip().upper()}"

    def classify_code(self, code: str | None) -> Classification:
        """Findings of one coded statement such as ``SNOMED:270492004``."""
        raw = "" if code is None else str(code)
        key = self._code_key(raw) if raw.strip() else ""
        if not key:
            return Classification(raw, key, (Finding("other", CERTAIN, False, "empty"),), None)
        codes = self.codes.get(key)
        if codes is None:
            return Classification(raw, key, (), key)
        findings = tuple(Finding(c, CERTAIN, False, f"code:{key}") for c in codes)
        return Classification(raw, key, findings, None)


def _check_lexicon_keys(data: dict, path: Path) -> None:
    required = {
        "lexicon": {"id"},
        "normalize": {"pre", "abbreviations"},
        "cues": {
            "clause_breaks", "negation_before", "negation_after", "uncertainty_before",
            "uncertainty_after", "filler",
        },
    }
    allowed_top = set(required) | {"pattern", "code", "code_systems"}
    for section in data:
        if section not in allowed_top:
            raise RuleSetError(
                f"unknown section [{section}] in lexicon {path}; known: {sorted(allowed_top)}"
            )
    for section, keys in required.items():
        table = data.get(section, {})
        missing = keys - set(table)
        extra = set(table) - keys
        if missing or extra:
            raise RuleSetError(
                f"lexicon {path} [{section}]: missing keys {sorted(missing)}, unknown keys "
                f"{sorted(extra)}; fix the file"
            )
    for i, entry in enumerate(data.get("pattern", []), start=1):
        if set(entry) != {"id", "regex", "findings"}:
            raise RuleSetError(
                f"pattern {i} in lexicon {path} must have exactly the keys id, regex, findings; "
                f"got {sorted(entry)}"
            )
    for i, entry in enumerate(data.get("code", []), start=1):
        if not {"code", "findings"} <= set(entry) <= {"code", "findings", "source"}:
            raise RuleSetError(
                f"code entry {i} in lexicon {path} must have keys code, findings (and source)"
            )
        unknown = [f for f in entry["findings"] if f not in FINDINGS]
        if unknown:
            raise RuleSetError(f"code {entry['code']} in lexicon {path} has unknown findings {unknown}")


@cache
def load_lexicon(path: Path) -> Lexicon:
    """Read and compile a lexicon file; raises RuleSetError naming the file and the key."""
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise RuleSetError(f"lexicon {path} is not valid TOML: {exc}") from exc
    _check_lexicon_keys(data, Path(path))
    return Lexicon(data, Path(path))

"""What a reader checks before it trusts a stored result set, without re-executing anything
(that is replay's job): the hashes stored with the tables, one row per run id, and the runs the
result set's own spec derives (every variant × seed).

``show`` and ``diff`` print the findings as warnings and still report what is stored; replay
refuses duplicated runs and reports missing ones.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

from compiler.errors import SpecError
from compiler.hashing import run_id as make_run_id
from compiler.loader import load_text
from runtime.store import SEQUENTIAL, ResultSet, edits

__all__ = ["Audit", "audit"]


@dataclass
class Audit:
    expected: int                      # runs the stored spec derives
    stored: int                        # of those, how many are stored
    missing: dict[str, list[int]]      # variant label -> seeds not stored, in study order
    duplicated: dict[str, int]         # run id -> rows holding it (more than one)
    foreign: list[str]                 # stored run ids the spec does not derive
    edits: list[str] | None            # None: no hashes stored (an older result set)
    spec_problem: str | None = None    # the stored spec does not load: counts not checked

    @property
    def missing_runs(self) -> int:
        return self.expected - self.stored

    def warnings(self) -> list[str]:
        out = []
        if self.spec_problem:
            out.append(f"its stored spec does not load ({self.spec_problem}): the runs it should hold are unknown")
        if self.missing:
            named = "; ".join(f"{label} (seed{'s' if len(seeds) > 1 else ''} {', '.join(map(str, seeds))})"
                              for label, seeds in self.missing.items())
            out.append(f"incomplete: {self.stored} of {self.expected} runs stored; missing: {named}")
        if self.duplicated:
            out.append("duplicated runs: " + ", ".join(f"{rid} ({n} rows)" for rid, n in self.duplicated.items())
                       + "; lesion writes one row per run")
        if self.foreign:
            out.append(f"{len(self.foreign)} stored run(s) that its spec does not derive: {', '.join(self.foreign[:3])}"
                       + (" …" if len(self.foreign) > 3 else ""))
        return out + (self.edits or [])

    def notes(self) -> list[str]:
        if self.edits is None:
            return ["no consistency hash stored (written by an older lesion): edits made after writing "
                    "cannot be detected without 'lesion replay'"]
        return []


def audit(rs: ResultSet, loaded=None) -> Audit:
    """``loaded``: the result set's stored spec when the caller has loaded it already."""
    ids = rs.runs.column("run_id").to_pylist()
    counts = Counter(ids)
    duplicated = {rid: n for rid, n in counts.items() if n > 1}
    problem = None
    if loaded is None:
        try:
            loaded = load_text(rs.meta["spec_source"], rs.meta["spec_path"] or str(rs.path))
        except SpecError as err:
            problem = err.problems[0].render()
    missing: dict[str, list[int]] = {}
    expected = set()
    if loaded is not None:
        for v in loaded.variants:
            for seed in loaded.spec.study.seed_list:
                rid = make_run_id(v.hash, seed)
                expected.add(rid)
                if rid not in counts:
                    missing.setdefault(v.label, []).append(seed)
    derived = set(expected)
    rule = rs.meta.get(SEQUENTIAL)
    if loaded is not None and rule is not None:
        # Seeds a stopping rule added: its runs may use any seed of the procedure's sequence (the
        # spec's, then the integers above them up to the rule's maximum); which ones is its replay's call.
        first = loaded.spec.study.seed_list
        added = range(max(first) + 1, max(first) + 1 + max(rule["max_seeds"] - len(first), 0))
        derived |= {make_run_id(v.hash, seed) for v in loaded.variants for seed in added}
    foreign = [rid for rid in counts if rid not in derived] if loaded is not None else []
    return Audit(len(expected), len(expected & counts.keys()), missing, duplicated, foreign, edits(rs), problem)

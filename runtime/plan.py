"""Planning: a study's runs (variant × seed) in groups — runs of one program computed together in
one call — of a fixed lane width.

Every variant with the same program key shares one XLA program, vmapped over lanes of
(knobs, seed). The lane width is part of what decides a run's bits (XLA:CPU results depend on the
batch width, not on the neighbouring lanes' values), so:

- the width of a program is chosen from *all* of the study's runs of that program, never from
  the runs still missing, so a resumed study computes its remaining runs at the width the first
  invocation used;
- a group with fewer runs than the width is padded with copies of its first run, and the padding
  is discarded;
- a resumed study keeps the width its stored runs of a program were computed at, even when
  the first invocation forced another one with ``--lanes``;
- replay re-plans a stored run at its recorded width.

The width is the number of runs of the program, capped by ``max_lanes`` and by a memory bound.
"""

from __future__ import annotations

from dataclasses import dataclass

from compiler.expand import Variant
from compiler.hashing import run_id

__all__ = ["Run", "Group", "plan", "DEFAULT_MAX_LANES"]

# Wider lanes amortize per-step overhead on small models; beyond ~32 the matrices are big enough
# that XLA:CPU gains nothing more on two cores and memory grows linearly.
DEFAULT_MAX_LANES = 32


@dataclass(frozen=True)
class Run:
    run_id: str
    variant: Variant
    seed: int


@dataclass(frozen=True)
class Group:
    group_id: str          # "<program key>-<chunk index>"
    program: str           # the program key its runs share
    lane_width: int
    runs: tuple[Run, ...]  # 1..lane_width real runs; execution pads to lane_width

    @property
    def padding(self) -> int:
        return self.lane_width - len(self.runs)


def plan(variants: list[Variant], seeds: list[int], *, lanes: int | None = None,
         max_lanes: int = DEFAULT_MAX_LANES, lane_budget: dict[str, int] | None = None,
         widths: dict[str, int] | None = None, seeds_of: dict[str, list[int]] | None = None,
         per_round: int | None = None) -> list[Group]:
    """Groups of runs in a fixed order (program key in order of first appearance, then variant
    order, then seed order). ``lanes`` forces the width; ``lane_budget`` maps a program key to
    the most lanes its memory allows; ``widths`` maps a program key to the width its stored runs
    were computed at, which a resumed study keeps (over ``lanes`` and the budget) so that one
    program never mixes widths.

    Seeds added in rounds (``lesion run --until-decided``): ``seeds_of`` maps a variant hash to the
    seeds to plan for it (variants not in it are left out), and ``per_round`` K makes a program's
    width ``min(its variants × K, max_lanes)`` — one full round of the program, the same in
    every round and on resume, whatever arms are still open (a run's bits must not depend on the
    round it ran in); a round with fewer open arms is padded."""
    by_program: dict[str, list[Run]] = {}
    count: dict[str, int] = {}
    for v in variants:
        count[v.program] = count.get(v.program, 0) + 1
        for s in (seeds if seeds_of is None else seeds_of.get(v.hash, [])):
            by_program.setdefault(v.program, []).append(Run(run_id(v.hash, s), v, s))
    groups = []
    for key, runs in by_program.items():
        if widths and key in widths:
            width = widths[key]
        elif lanes is not None:
            width = lanes
        else:
            width = min(len(runs) if per_round is None else count[key] * per_round, max_lanes)
            if lane_budget and key in lane_budget:
                width = max(1, min(width, lane_budget[key]))
        for i in range(0, len(runs), width):
            chunk = tuple(runs[i:i + width])
            groups.append(Group(f"{key}-{i // width}", key, width, chunk))
    return groups

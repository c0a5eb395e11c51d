"""Acceptance sampling by attributes, ISO 2859-1 (equivalently ANSI/ASQ Z1.4): lot size and
inspection level -> sample-size code letter -> sample size; code letter and AQL -> acceptance
number Ac and rejection number Re for single sampling, normal inspection.

The tables below are written out as the standard prints them [standard: ISO 2859-1 Table 1
and Table 2-A; ANSI/ASQ Z1.4 Tables I and II-A]. Values confirmed against a second source:
lot 1201-3200 at level II -> K, n = 125; K at AQL 1.0 -> 3/4, at AQL 2.5 -> 7/8. All other
entries are `from memory` and follow the tables' diagonal pattern (each step down one code
letter equals one step up the AQL series). Check them against your copy of the standard
before a contractual decision.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from benchkit.errors import UserError

LEVELS = ("S-1", "S-2", "S-3", "S-4", "I", "II", "III")

# Table 1: sample-size code letters [standard: ISO 2859-1 Table 1; from memory except the
# 1201-3200 row at level II]. (lowest lot size, highest lot size or None) -> letters by LEVELS.
CODE_LETTER_TABLE = (
    ((2, 8),           "A A A A A A B"),
    ((9, 15),          "A A A A A B C"),
    ((16, 25),         "A A B B B C D"),
    ((26, 50),         "A B B C C D E"),
    ((51, 90),         "B B C C C E F"),
    ((91, 150),        "B B C D D F G"),
    ((151, 280),       "B C D E E G H"),
    ((281, 500),       "B C D E F H J"),
    ((501, 1200),      "C C E F G J K"),
    ((1201, 3200),     "C D E G H K L"),
    ((3201, 10000),    "C D F G J L M"),
    ((10001, 35000),   "C D F H K M N"),
    ((35001, 150000),  "D E G J L N P"),
    ((150001, 500000), "D E G J M P Q"),
    ((500001, None),   "D E H K N Q R"),
)

# Sample size per code letter [standard: ISO 2859-1 Table 2-A; from memory except K = 125].
SAMPLE_SIZE = {"A": 2, "B": 3, "C": 5, "D": 8, "E": 13, "F": 20, "G": 32, "H": 50, "J": 80,
               "K": 125, "L": 200, "M": 315, "N": 500, "P": 800, "Q": 1250, "R": 2000}
LETTERS = tuple(SAMPLE_SIZE)

# AQLs supported (percent nonconforming items); 10 % and above, and below 0.065 %, are left out.
AQLS_PCT = (0.065, 0.10, 0.15, 0.25, 0.40, 0.65, 1.0, 1.5, 2.5, 4.0, 6.5)

# Table 2-A, single sampling plans for normal inspection: "Ac/Re", or an arrow:
# "v" = use the first plan below the arrow, "^" = use the first plan above it (the sample
# size changes with the plan) [standard: ISO 2859-1 Table 2-A; from memory except K at 1.0
# (3/4) and at 2.5 (7/8)].
NORMAL_SINGLE_TABLE = {
    #        0.065   0.10   0.15   0.25   0.40   0.65    1.0    1.5    2.5    4.0    6.5
    "A": "      v      v      v      v      v      v      v      v      v      v    0/1",
    "B": "      v      v      v      v      v      v      v      v      v    0/1      ^",
    "C": "      v      v      v      v      v      v      v      v    0/1      ^      v",
    "D": "      v      v      v      v      v      v      v    0/1      ^      v    1/2",
    "E": "      v      v      v      v      v      v    0/1      ^      v    1/2    2/3",
    "F": "      v      v      v      v      v    0/1      ^      v    1/2    2/3    3/4",
    "G": "      v      v      v      v    0/1      ^      v    1/2    2/3    3/4    5/6",
    "H": "      v      v      v    0/1      ^      v    1/2    2/3    3/4    5/6    7/8",
    "J": "      v      v    0/1      ^      v    1/2    2/3    3/4    5/6    7/8  10/11",
    "K": "      v    0/1      ^      v    1/2    2/3    3/4    5/6    7/8  10/11  14/15",
    "L": "    0/1      ^      v    1/2    2/3    3/4    5/6    7/8  10/11  14/15  21/22",
    "M": "      ^      v    1/2    2/3    3/4    5/6    7/8  10/11  14/15  21/22      ^",
    "N": "      v    1/2    2/3    3/4    5/6    7/8  10/11  14/15  21/22      ^      ^",
    "P": "    1/2    2/3    3/4    5/6    7/8  10/11  14/15  21/22      ^      ^      ^",
    "Q": "    2/3    3/4    5/6    7/8  10/11  14/15  21/22      ^      ^      ^      ^",
    "R": "    3/4    5/6    7/8  10/11  14/15  21/22      ^      ^      ^      ^      ^",
}


@dataclass(frozen=True)
class SamplingPlan:
    """A single sampling plan: inspect n items, accept the lot with at most Ac nonconforming,
    reject it with Re or more. `letter` is the code letter of the plan used, which differs from
    `table_letter` when an arrow in Table 2-A moved the plan."""

    lot_size: int
    level: str
    aql_pct: float
    table_letter: str
    letter: str
    n: int
    Ac: int
    Re: int
    full_inspection: bool

    def to_dict(self) -> dict:
        return dict(self.__dict__)


def normalise_level(level: str) -> str:
    text = str(level).strip().upper()
    m = re.fullmatch(r"S-?([1-4])", text)
    if m:
        text = f"S-{m.group(1)}"
    if text not in LEVELS:
        raise UserError(f"inspection level {level!r} unknown: use one of {', '.join(LEVELS)}")
    return text


def code_letter(lot_size: int, level: str = "II") -> str:
    """Sample-size code letter for a lot size and inspection level (ISO 2859-1 Table 1)."""
    lvl = normalise_level(level)
    n_lot = _lot_size(lot_size)
    col = LEVELS.index(lvl)
    for (lo, hi), letters in CODE_LETTER_TABLE:
        if n_lot >= lo and (hi is None or n_lot <= hi):
            return letters.split()[col]
    raise AssertionError("unreachable: the table covers every lot size from 2")


def _lot_size(lot_size) -> int:
    try:
        n = int(lot_size)
    except (TypeError, ValueError):
        raise UserError(f"lot size {lot_size!r} must be a whole number >= 2") from None
    if n != lot_size and not (isinstance(lot_size, str) and str(n) == lot_size.strip()):
        raise UserError(f"lot size {lot_size!r} must be a whole number >= 2")
    if n < 2:
        raise UserError(f"lot size {n} too small: ISO 2859-1 starts at lots of 2")
    return n


def sample_size(lot_size: int, level: str = "II") -> tuple[str, int]:
    """(code letter, sample size) for a lot; the caller inspects every item when n >= lot."""
    letter = code_letter(lot_size, level)
    return letter, SAMPLE_SIZE[letter]


def _aql_index(aql_pct: float) -> int:
    for i, a in enumerate(AQLS_PCT):
        if math.isclose(float(aql_pct), a, rel_tol=1e-9):
            return i
    raise UserError(f"AQL {aql_pct!r} not supported: use one of "
                    f"{', '.join(f'{a:g}' for a in AQLS_PCT)} (percent nonconforming)")


def table_entry(letter: str, aql_pct: float) -> str:
    """The raw Table 2-A cell: 'Ac/Re', 'v' or '^'."""
    if letter not in NORMAL_SINGLE_TABLE:
        raise UserError(f"code letter {letter!r} unknown: use one of {''.join(LETTERS)}")
    return NORMAL_SINGLE_TABLE[letter].split()[_aql_index(aql_pct)]


def normal_plan(letter: str, aql_pct: float) -> tuple[str, int, int]:
    """Follow Table 2-A's arrows from (letter, AQL) to a plan: (letter used, Ac, Re)."""
    i = LETTERS.index(letter) if letter in LETTERS else None
    if i is None:
        raise UserError(f"code letter {letter!r} unknown: use one of {''.join(LETTERS)}")
    cell = table_entry(letter, aql_pct)
    step = {"v": 1, "^": -1}.get(cell, 0)
    while step:
        i += step
        cell = table_entry(LETTERS[i], aql_pct)
        if cell in ("v", "^"):
            continue
        break
    ac, re_ = (int(x) for x in cell.split("/"))
    return LETTERS[i], ac, re_


def plan_for_lot(lot_size: int, aql_pct: float = 1.0, level: str = "II") -> SamplingPlan:
    """The normal-inspection single sampling plan for a lot (ISO 2859-1)."""
    lvl = normalise_level(level)
    n_lot = _lot_size(lot_size)
    table_letter = code_letter(n_lot, lvl)
    letter, ac, re_ = normal_plan(table_letter, aql_pct)
    n = SAMPLE_SIZE[letter]
    full = n >= n_lot  # ISO 2859-1: sample size >= lot size -> inspect every item
    return SamplingPlan(n_lot, lvl, float(aql_pct), table_letter, letter, min(n, n_lot), ac, re_, full)


def lot_decision(plan: SamplingPlan, n_inspected: int, n_nonconforming: int,
                 n_undecided: int = 0) -> str:
    """Accept / reject / not decidable for a lot under a plan.

    Undecided items count as possibly nonconforming: the lot is rejected once the certain
    nonconforming items reach Re; it is accepted only when the full sample was inspected and
    even counting every undecided item as nonconforming stays within Ac.
    """
    from benchkit.verify.decision import CONFORMING, NONCONFORMING, NOT_DECIDABLE

    if n_nonconforming >= plan.Re:
        return NONCONFORMING
    if n_inspected >= plan.n and n_nonconforming + n_undecided <= plan.Ac:
        return CONFORMING
    return NOT_DECIDABLE

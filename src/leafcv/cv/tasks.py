"""Tasks: the units of work of a structure's cross-validation, their outputs and their keys.

A task (`Task`) is a pure function of its payload, its inputs' outputs and the shared context
(`leafcv.cv.plan.Context`), so the same tasks give the same numbers whichever process, machine or
order runs them; its key (`task_key`) hashes all of these, so a run folder's task store
(`leafcv.batch.store`) can keep every finished output and skip it on a re-run. Outputs are
``TaskOutput(record, arrays)``: a JSON record and named float arrays (draws, per-draw log marginals).
Every driver passes outputs through `roundtrip`, the form a store returns, so that an output read back
from disk and one just computed are the same values.

A plan (`Plan`) is a generator: it yields a list of tasks, receives their outputs (in the order
yielded) and yields the next list, until it returns ``(CVResult, CVDetails, keep)``
(`leafcv.cv.plan.plan`; one plan per method in `leafcv.cv.plans`).

Tests: tests/batch/test_store.py (outputs back bit for bit), tests/cv/test_plan.py,
tests/batch/test_runner.py.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Generator

import numpy as np
import pandas as pd

from ..jsonio import plain
from ..spec import Structure

#: Version of task payloads and outputs: part of every task key, so a change of what a task computes
#: never reuses an output stored by an earlier leafcv. 3: quadrature checked by shifted rules and a
#: brute-force screen, refit draw counts recorded, PSIS by arviz-stats (its Pareto tail fit differs slightly
#: from ArviZ 0.23's ``psislw``), so no stored score of version 2 is reused.
TASK_VERSION = 3
#: Leaves scored per ``score`` task: blocks bound a worker's memory (curve draws of a block's leaves)
#: and let several workers score one fit at once. The scores do not depend on the block size.
SCORE_BLOCK = 16


@dataclass(frozen=True)
class Task:
    """One unit of work of one structure."""

    key: str                      # hash of everything the output depends on
    kind: str                     # full | score | refit | fold | level
    structure: Structure
    label: str                    # in words, for progress and errors
    payload: dict = field(hash=False, default_factory=dict)
    inputs: tuple[str, ...] = ()  # keys of the tasks whose outputs this one reads


@dataclass
class TaskOutput:
    record: dict
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


#: A structure's plan: yields task lists, receives their outputs, returns ``(CVResult, CVDetails, keep)``.
Plan = Generator[list[Task], list[TaskOutput], tuple]


def record_text(record: dict) -> str:
    """A record as JSON text (NaN and infinities as JSON's common extension; floats exact)."""
    return json.dumps(plain(record), allow_nan=True, sort_keys=True)


def roundtrip(output: TaskOutput) -> TaskOutput:
    """``output`` as a store gives it back: the record through JSON, the arrays as float arrays."""
    return TaskOutput(json.loads(record_text(output.record)),
                      {k: np.asarray(v) for k, v in output.arrays.items()})


def task_key(base: str, kind: str, structure: Structure, payload: dict, inputs: tuple[str, ...]) -> str:
    text = json.dumps([TASK_VERSION, base, kind, repr(structure), {k: repr(v) for k, v in sorted(payload.items())},
                       list(inputs)])
    return hashlib.sha256(text.encode()).hexdigest()


def curve_record(curve: pd.DataFrame | None) -> dict | None:
    """A leaf's predictive curves as a record's value (None: no curve)."""
    return None if curve is None else {c: curve[c].tolist() for c in curve.columns}


def curve_frame(record: dict | None) -> pd.DataFrame | None:
    """The curves `curve_record` wrote, as a frame again."""
    return None if record is None else pd.DataFrame(record)

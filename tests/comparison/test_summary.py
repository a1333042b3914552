"""Tests of leafcv.comparison.summary (`describe`): the summary `leafcv check` prints, on the agreed example."""
from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from leafcv.comparison import describe, load_comparison
from leafcv.spec import PARAMETERS

from .common import EXAMPLE


@pytest.fixture()
def example(tmp_path: Path):
    path = tmp_path / "comparison-example.toml"
    shutil.copy(EXAMPLE, path)
    return load_comparison(path), path


def test_describe_example(example) -> None:
    # Line formats given in the task for `leafcv check`; links per DESIGN.md "The model"
    # (log for rates, logit for alpha and theta).
    comparison, _ = example
    lines = describe(comparison).splitlines()
    # `leafcv check` names the data roles as the example writes them
    assert ("  columns: net_assimilation = 'assim_umol', intercellular_co2 = 'ci_leaf', photon_flux = 'light_in', "
            "leaf_temperature = 'leaf_temp_c', leaf = 'leaf_id', curve = 'curve'") in lines
    assert "  intercellular_co2 in umol/mol" in lines
    blocks = {}
    for line in lines:
        if line.startswith("structure "):
            current = line.split("'")[1]
            blocks[current] = []
        elif line.startswith("  ") and blocks and not line.startswith("  columns"):
            blocks[current].append(line.strip())
    assert list(blocks) == ["pooled", "leaf-vcmax-alpha", "traits-month-fixed", "traits-month-random"]
    assert "vcmax25: log link; intercept + fixed leaf_n, month + random leaf" in blocks["traits-month-fixed"]
    assert "jmax25: log(jmax25/vcmax25) shared by all leaves" in blocks["pooled"]
    assert "alpha: logit link; shared by all leaves" in blocks["pooled"]
    assert "vcmax25: log link; intercept + fixed leaf_n + random leaf, month" in blocks["traits-month-random"]
    assert all(len([x for x in b if not x.startswith("model:")]) == len(PARAMETERS) for b in blocks.values())
    # DESIGN.md "The model": hard minimum, 4/8 electrons, Arrhenius, normal likelihood by default
    assert all("model: hard minimum, 4/8 electrons per CO2, Arrhenius, normal likelihood, one residual SD" in b
               for b in blocks.values())

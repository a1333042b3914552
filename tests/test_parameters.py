"""The table of structured parameters (leafcv.parameters): the one source of names and links, whose link
functions are inverse pairs and whose ratio parameters resolve to value / Vcmax25."""
from __future__ import annotations

import numpy as np

from leafcv.parameters import PARAMETER, PARAMETER_TABLE, parameters
from leafcv.spec import LINKS, PARAMETERS


def test_the_parameter_table_is_the_one_source_of_names_and_links():
    assert PARAMETERS == tuple(p.name for p in parameters(tpu=False))
    assert [p.name for p in parameters(tpu=True)] == list(PARAMETERS) + ["tpu25"]
    assert LINKS == {p.name: p.link for p in PARAMETER_TABLE}
    # links are inverse pairs; a log ratio resolves to value / Vcmax25
    for p in PARAMETER_TABLE:
        v = np.array([p.bounds[0], np.mean(p.bounds), p.bounds[1]]) * (1 if p.link == "log" else 0.999)
        np.testing.assert_allclose(p.from_link(p.to_link(v)), v, rtol=1e-12)
    j = PARAMETER["jmax25"]
    np.testing.assert_allclose(j.to_link(170.0, vcmax25=100.0), np.log(1.7))
    np.testing.assert_allclose(j.from_link(np.log(1.7), np.log(100.0)), 170.0)

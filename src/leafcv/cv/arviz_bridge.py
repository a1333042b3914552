"""The one module that builds and reads ArviZ result objects (ArviZ pinned to >=0.23,<0.24).

ArviZ 0.23's ``compare`` accepts precomputed ``ELPDData`` (a pandas Series) whose index is
``elpd_loo, se, p_loo, n_samples, n_data_points, warning, loo_i, scale`` (``pareto_k`` and
``good_k`` optional), with ``loo_i`` an xarray DataArray. Every method (auto, exact, kfold) is
labelled ``loo`` because ``compare`` only knows ``loo`` and ``waic``; the per-leaf values are
leave-one-leaf-out (or grouped K-fold) elpd all the same. ``compare`` reports ``elpd_diff`` as
best − model (>= 0); :func:`compare_results` turns it into model − best (<= 0).
"""
from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from .result import CVResult, check_comparable

LEAF_DIM = "leaf"


def to_elpd_data(result: CVResult) -> az.ELPDData:
    """Convert a result to ArviZ's ``ELPDData`` on the log scale.

    Parameters
    ----------
    result
        Cross-validation result of one structure.

    Returns
    -------
    arviz.ELPDData
        ``elpd_loo`` and ``se`` from the result (see :attr:`CVResult.se`), ``p_loo`` NaN (no
        effective number of parameters is estimated by leave-one-leaf-out), ``n_samples`` the
        result's draws, ``n_data_points`` the number of leaves, ``warning`` True when a k-hat is
        above the threshold, ``loo_i`` over dimension ``"leaf"``, and ``pareto_k``/``good_k``
        when the result has k-hats.
    """
    coords = {LEAF_DIM: list(result.leaves)}
    loo_i = xr.DataArray(np.array(result.elpd_i), dims=[LEAF_DIM], coords=coords, name="loo_i")
    values: dict[str, object] = {
        "elpd_loo": result.elpd,
        "se": result.se,
        "p_loo": float("nan"),
        "n_samples": int(result.n_draws),
        "n_data_points": result.n_leaves,
        "warning": False,
        "loo_i": loo_i,
    }
    if result.pareto_k is not None:
        good_k = result.khat_threshold
        values["warning"] = bool(np.any(result.pareto_k > good_k))
        values["pareto_k"] = xr.DataArray(np.array(result.pareto_k), dims=[LEAF_DIM], coords=coords, name="pareto_k")
        values["good_k"] = good_k
    values["scale"] = "log"
    return az.ELPDData(data=list(values.values()), index=list(values.keys()))


def _shift_pointwise(elpd: az.ELPDData, offset: np.ndarray) -> az.ELPDData:
    """A copy of ``elpd`` whose ``loo_i`` has ``offset`` (one value per leaf) subtracted.

    ``compare``'s stacking exponentiates ``loo_i`` without a log-sum-exp, so a leaf's joint
    density below about exp(-745) underflows to 0. Subtracting the same value from every
    structure's elpd of a leaf changes neither the stacking optimum (the objective moves by a
    constant) nor any paired difference; ``elpd_loo`` and ``se`` are read from their own entries.
    """
    shifted = elpd.copy()
    shifted["loo_i"] = elpd["loo_i"] - xr.DataArray(offset, dims=[LEAF_DIM], coords=elpd["loo_i"].coords)
    return shifted


def compare_results(results: dict[str, CVResult]) -> pd.DataFrame:
    """Compare structures with ``arviz.compare(ic="loo", method="stacking", scale="log")``.

    Parameters
    ----------
    results
        Result per structure name; all must share leaves (same order) and method.

    Returns
    -------
    pandas.DataFrame
        Indexed by structure, best first, with columns ``elpd``, ``se``, ``elpd_diff``
        (structure − best, <= 0), ``se_diff`` (ArviZ's ``dse``, sqrt(G · var(d)) with ddof=0)
        and ``weight`` (stacking weights, Yao et al. 2018).

    Raises
    ------
    ValueError
        If the results cannot be compared (see :func:`leafcv.cv.result.check_comparable`) or a
        key differs from its result's structure name.
    """
    mismatched = [key for key, res in results.items() if key != res.structure]
    if mismatched:
        raise ValueError(f"keys differ from the structure names of their results: {', '.join(mismatched)}")
    check_comparable(list(results.values()))
    offset = np.max(np.stack([r.elpd_i for r in results.values()]), axis=0)
    elpds = {name: _shift_pointwise(to_elpd_data(res), offset) for name, res in results.items()}
    with warnings.catch_warnings():
        # ArviZ 0.23 calls DataFrame.sort_values(inplace=True), deprecated in pandas 3.1
        warnings.filterwarnings("ignore", message="The inplace keyword")
        table = az.compare(elpds, ic="loo", method="stacking", scale="log")
    out = pd.DataFrame(
        {
            "elpd": table["elpd_loo"].astype(float),
            "se": table["se"].astype(float),
            "elpd_diff": 0.0 - table["elpd_diff"].astype(float),  # 0.0 - x: no negative zero
            "se_diff": table["dse"].astype(float),
            "weight": table["weight"].astype(float),
        }
    )
    out.index.name = "structure"
    return out

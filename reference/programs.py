"""Hand-written reference Stan programs (reference/stan/reference_*.stan) and how to talk to them.

Each reference encodes one structure directly from the equations. This module builds its data from
the data set itself (not from leafcv's design), translates a point of the generic program into the
reference's parameters, and names the population quantities both programs share, so that tests and
bench/bench_reference.py can compare the two programs quantity by quantity.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from leafcv.design import with_free_parameters, Design, leaf_link_values, level_values
from leafcv.priors import PriorSet
from leafcv.spec import DataSpec, ParamSpec, Structure

STAN = Path(__file__).resolve().parent / "stan"

#: The demo's trait columns (user names) and grouping columns.
N_COL, CHL_COL, SLA_COL, MONTH_COL, SPECIES_COL = "n_area", "chl_ug", "sla_m2kg", "campaign", "taxon"


@dataclass(frozen=True)
class Reference:
    name: str
    program: Path
    grouping: str          # MONTH_COL (fixed month levels) or SPECIES_COL (random N slopes)

    def structure(self, leaf_centring: str = "auto", group_centring: str = "auto") -> Structure:
        """The structure the reference encodes, as leafcv's generic program is told it."""
        leaf = {"leaf": leaf_centring}
        if self.grouping == MONTH_COL:
            vcmax = ParamSpec(fixed=(N_COL, MONTH_COL), random=("leaf",), centring=leaf)
        else:
            vcmax = ParamSpec(fixed=(N_COL,), random=("leaf",), slopes=((N_COL, SPECIES_COL),),
                              centring={**leaf, f"{N_COL}|{SPECIES_COL}": group_centring})
        return Structure(self.name, {
            "vcmax25": vcmax,
            "jmax25": ParamSpec(ratio_to="vcmax25"),
            "alpha": ParamSpec(fixed=(CHL_COL, SLA_COL), random=("leaf",), centring=leaf),
            "theta": ParamSpec(),
            "rd25": ParamSpec(ratio_to="vcmax25"),
        })

    def program_text(self) -> str:
        return self.program.read_text()


TRAITS_MONTH = Reference("ref-traits-month", STAN / "reference_traits_month.stan", MONTH_COL)
SPECIES_SLOPES = Reference("ref-species-slopes", STAN / "reference_species_slopes.stan", SPECIES_COL)


def _levels(values) -> list[str]:
    return sorted(set(map(str, values)))


def reference_data(ref: Reference, dataset, spec: DataSpec, priors: PriorSet | None = None) -> dict:
    """Stan data of the reference program, built from the data set and the comparison's trait scaling."""
    priors = priors or PriorSet()
    obs, leaves = dataset.obs, dataset.leaves

    def trait(col):
        x = leaves[col].to_numpy(float)
        return (x - spec.centre.get(col, x.mean())) / spec.scale.get(col, 1.0)

    groups = leaves[ref.grouping].astype(str).to_numpy()
    levels = _levels(groups)
    ip = priors.intercepts
    rp = priors.ratio_intercepts
    data = {
        "N": len(obs), "L": len(leaves), "leaf": obs["leaf_index"].to_numpy() + 1,
        "ci": obs["ci"].to_numpy(float), "q": obs["ppfd"].to_numpy(float), "tleaf": obs["t_leaf"].to_numpy(float),
        "o2": obs["o2"].to_numpy(float), "a": obs["a_net"].to_numpy(float),
        "n": trait(N_COL), "chl": trait(CHL_COL), "sla": trait(SLA_COL),
        "vcmax_ref_mu": ip["vcmax25"].a, "vcmax_ref_sd": ip["vcmax25"].b,
        "jratio_mu": rp["jmax25"].a, "jratio_sd": rp["jmax25"].b,
        "alpha_ref_mu": ip["alpha"].a, "alpha_ref_sd": ip["alpha"].b,
        "theta_a": ip["theta"].a, "theta_b": ip["theta"].b,
        "rdratio_mu": rp["rd25"].a, "rdratio_sd": rp["rd25"].b,
        "slope_sd_log": priors.slope_sd_log, "slope_sd_logit": priors.slope_sd_logit,
        "leaf_sd_scale": priors.leaf_sd_scale, "sigma_scale": priors.sigma_scale,
    }
    assert ip["theta"].family == "beta" and all(p.family == "normal" for k, p in ip.items() if k != "theta")
    index = np.searchsorted(levels, groups) + 1
    if ref.grouping == MONTH_COL:
        data.update(M=len(levels), month=index, level_sd=priors.level_sd)
    else:
        data.update(G=len(levels), sp=index, group_sd_scale=priors.group_sd_scale)
    return data


def random_generic_point(design: Design, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """A random, plausible point of the generic program's parameters for ``design`` (demo magnitudes).

    Centred cells hold the leaf's own link value, so they are put near the population value.
    """
    d = design.stan_data
    point = {
        "b0": np.array([np.log(50), np.log(1.8), -0.8, 1.0, np.log(0.015)]) + rng.normal(0, 0.1, 5),
        "beta": rng.normal(0, 0.2, d["K"]), "tau": rng.uniform(0.05, 0.5, d["R"]),
        "u_c": rng.normal(0, 0.1, d["Qc"]), "u_z": rng.normal(0, 1, d["Q"] - d["Qc"]),
        "tau_leaf": rng.uniform(0.05, 0.3, d["Rl"]),
        "eta_c": rng.normal(0, 0.1, d["Mc"]), "eta_z": rng.normal(0, 1, d["Mn"]),
        "sigma": rng.uniform(0.3, 1.0, 1), "nu": np.zeros(0),
    }
    point = with_free_parameters(design, point)
    mu, _ = leaf_link_values(design, {k: v[None, ...] for k, v in point.items()})
    point["eta_c"] = mu[0].T.reshape(-1)[design.cen_cells] + point["eta_c"]
    return point


def _coef(design: Design, param: str, label: str) -> int:
    for k, c in enumerate(design.coefficients):
        if c.param == param and c.label == label:
            return k
    raise KeyError(f"{param} {label}: not among {[(c.param, c.label) for c in design.coefficients]}")


def generic_to_reference(ref: Reference, design: Design, point: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The reference program's parameters at one point of the generic program (arrays without draw axis)."""
    draws = {k: np.asarray(v, float)[None, ...] for k, v in point.items()}
    _, eta = leaf_link_values(design, draws)
    P = list(design.params)
    out = {k: float(v[0]) for k, v in population(ref, draws, design).items() if not k.startswith("b_month[")}
    out["log_vcmax"], out["logit_alpha"] = eta[0, :, P.index("vcmax25")], eta[0, :, P.index("alpha")]
    if ref.grouping == MONTH_COL:
        out["b_month"] = draws["beta"][0, _month_columns(design)]
    else:
        (gt,) = [gt for gt in design.group_terms if gt.slope_of == N_COL]
        out["z"] = level_values(design, draws)[0, gt.start:gt.start + len(gt.levels)] / out["tau_s"]
    return out


def _month_columns(design: Design) -> list[int]:
    """Columns of the month levels after the reference level, in level order (reference month 2, 3, ...)."""
    cols = [k for k, c in enumerate(design.coefficients) if c.term == MONTH_COL and c.kind == "level"]
    labels = [design.coefficients[k].label for k in cols]
    assert labels == sorted(labels), labels
    return cols


def population(ref: Reference, draws: dict[str, np.ndarray], design: Design | None = None) -> dict[str, np.ndarray]:
    """Population quantities by meaning, each (chains, draws), from the reference's draws or (with
    ``design``) from the generic program's draws."""
    if design is None:
        names = ["log_vcmax_ref", "log_jratio", "logit_alpha_ref", "logit_theta", "log_rdratio",
                 "b_n", "b_chl", "b_sla", "tau_v", "tau_a", "sigma"] + (["tau_s"] if ref.grouping == SPECIES_COL else [])
        out = {k: draws[k] for k in names}
        if ref.grouping == MONTH_COL:
            for i in range(draws["b_month"].shape[-1]):
                out[f"b_month[{i + 1}]"] = draws["b_month"][..., i]
        return out
    P = list(design.params)
    b0, beta = draws["b0"], draws["beta"]
    out = {
        "log_vcmax_ref": b0[..., P.index("vcmax25")], "log_jratio": b0[..., P.index("jmax25")],
        "logit_alpha_ref": b0[..., P.index("alpha")], "logit_theta": b0[..., P.index("theta")],
        "log_rdratio": b0[..., P.index("rd25")],
        "b_n": beta[..., _coef(design, "vcmax25", N_COL)],
        "b_chl": beta[..., _coef(design, "alpha", CHL_COL)], "b_sla": beta[..., _coef(design, "alpha", SLA_COL)],
    }
    for k, lt in enumerate(design.leaf_terms):
        out[{"vcmax25": "tau_v", "alpha": "tau_a"}[lt.param]] = draws["tau_leaf"][..., k]
    out["sigma"] = draws["sigma"][..., 0]
    if ref.grouping == MONTH_COL:
        for i, k in enumerate(_month_columns(design)):
            out[f"b_month[{i + 1}]"] = beta[..., k]
    else:
        (r, _), = [(r, gt) for r, gt in enumerate(design.group_terms) if gt.slope_of == N_COL]
        out["tau_s"] = draws["tau"][..., r]
    return out


def reference_inits(ref: Reference, design: Design, generic_inits: list[dict]) -> list[dict]:
    """The generic program's inits, chain by chain, translated to the reference's parameters."""
    out = []
    for init in generic_inits:
        point = {k: np.asarray(v, float) for k, v in init.items()}
        out.append({k: (np.asarray(v).tolist() if np.ndim(v) else float(v))
                    for k, v in generic_to_reference(ref, design, point).items()})
    return out

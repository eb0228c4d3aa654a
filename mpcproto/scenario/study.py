"""Studies: expand a scenario's sweeps and Monte Carlo draws into cases.

A scenario's ``[study]`` table declares

* **sweeps** (``[[study.sweep]]``): a key path (or several, moved together) and the values it takes;
  several sweeps form a full grid (the first sweep varies slowest);
* **draws** (``[[study.draw]]``): a key path and a seeded distribution (normal, uniform, lognormal,
  triangular, choice); ``study.draws`` (CI-sized) or ``study.full_draws`` (``full=True``) draws are made
  at every grid point.

Every case is plain data (:class:`Case`: the scenario as parsed from the file, the key-path overrides
of this case, its seed and its id) -- it pickles cheaply and carries no CasADi object, so it can be
shipped to any worker, which builds the models itself.

Stable ids and seeds
--------------------
A case id is ``<scenario name>`` plus ``-s<grid index>`` when the study sweeps and ``-d<draw index>``
when it draws, e.g. ``caustic_blending-s002-d0013``.  Grid indices count over each sweep's
``full_values`` (then any CI ``values`` not among them), the first sweep varying slowest, so an id
names the same grid point in a CI-sized and in a full study; draw *j* uses the random streams ``SeedSequence(seed, spawn_key=(j, 0))`` for its
parameter values and ``SeedSequence(seed, spawn_key=(j, 1))`` for the case's own seed (noise) -- the
children ``SeedSequence(seed).spawn()`` would hand out, but addressed by index, so ids, values and
seeds depend only on the file, never on the order or the worker a case runs in.  Draw *j* has the
same parameter values and noise at every grid point (common random numbers, so grid points compare
fairly), and the first ``draws`` draws of a full study are the CI-sized study's draws.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._specs import plain_copy
from ..exceptions import ScenarioError
from .schema import Scenario, _split, get_path, load_scenario, parse_scenario, set_path

__all__ = ["Case", "expand", "iter_cases", "count_cases", "case_scenario", "check_case",
           "draw_values"]


@dataclass(frozen=True)
class Case:
    """One run of a study: plain, picklable data.

    Attributes
    ----------
    case_id : str
        Stable id (see the module docstring).
    scenario : str
        Scenario name.
    file : str
        Scenario file path.
    raw : dict
        The scenario as parsed from the file (before validation; shared by every case of a study).
    params : dict
        Key path -> value for this case (sweep values and Monte Carlo draws), applied on top of *raw*.
    seed : int
        The case's own seed (noise of instruments, random signals).
    grid_index, draw_index : int or None
        Position in the sweep grid / in the Monte Carlo draws (None when the study has none).
    ci : bool
        Use the CI-sized settings of the scenario (``scenario.ci``).
    """

    case_id: str
    scenario: str
    file: str
    raw: dict = field(repr=False)
    params: dict = field(default_factory=dict)
    seed: int = 0
    grid_index: int | None = None
    draw_index: int | None = None
    ci: bool = False

    @property
    def id(self) -> str:
        return self.case_id

    def describe(self) -> dict[str, Any]:
        """Plain-data identity of the case (what a result record repeats)."""
        return {"case_id": self.case_id, "scenario": self.scenario, "file": self.file,
                "params": dict(self.params), "seed": self.seed, "grid_index": self.grid_index,
                "draw_index": self.draw_index}


def _case_seed(seed: int, j: int) -> int:
    ss = np.random.SeedSequence(seed, spawn_key=(j, 1))
    return int(ss.generate_state(1, dtype=np.uint32)[0])


def _base_value(scn: Scenario, key: str) -> Any:
    """The file's value at *key*, or the model's default for a parameter / MV / DV not in the file."""
    parts = _split(key)
    try:
        # a transfer matrix's elements are the file's table (scn.data holds it checked)
        return get_path(scn.raw if parts[:2] == ["plant", "elements"] else scn.data, key,
                        file=scn.file)
    except ScenarioError:
        pass
    from .build import controller_model, plant_model

    head, sub, name = (parts + [None, None, None])[:3]
    # a controller's model of its own structure has its own parameters
    own = head == "controller_model" and scn.data["controller_model"].get("model") is not None
    m = controller_model(scn) if own else plant_model(scn)
    if head in ("plant", "controller_model") and sub == "parameters" and name in m.parameters:
        return m.parameters[name]
    if head == "operating_point" and sub in ("mvs", "dvs"):
        role = sub[:-1]
        if name in m.names(role):
            return float(m.variable(name).nominal)
    raise ScenarioError(
        f"expected a key with a value in the file or a parameter/MV/DV of model '{m.name}' "
        f"(a relative draw multiplies that value); found no value for '{key}'.",
        file=scn.file, key=key)


def draw_values(scn: Scenario, j: int) -> dict[str, Any]:
    """The Monte Carlo values of draw *j* (key path -> value), from ``SeedSequence(seed, (j, 0))``."""
    rng = np.random.default_rng(np.random.SeedSequence(scn.seed, spawn_key=(j, 0)))
    out: dict[str, Any] = {}
    for spec in scn.data["study"]["draw"]:
        dist = spec["distribution"]
        if dist == "normal":
            v = rng.normal(spec["mean"], spec["std"])
        elif dist == "uniform":
            v = rng.uniform(spec["low"], spec["high"])
        elif dist == "lognormal":
            v = spec["median"] * math.exp(spec["sigma"] * rng.standard_normal())
        elif dist == "triangular":
            v = rng.triangular(spec["low"], spec["mode"], spec["high"])
        else:  # choice
            v = spec["values"][int(rng.integers(len(spec["values"])))]
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            v = float(v)
            if spec["relative"]:
                base = _base_value(scn, spec["key"])
                if isinstance(base, bool) or not isinstance(base, (int, float)):
                    raise ScenarioError(
                        f"expected a number at the key a relative draw multiplies; found {base!r}.",
                        file=scn.file, key=spec["key"])
                v = float(base) * v
            if "clip_low" in spec:
                v = max(v, spec["clip_low"])
            if "clip_high" in spec:
                v = min(v, spec["clip_high"])
        out[spec["key"]] = v
    return out


def _axes(scn: Scenario) -> list[list[Any]]:
    """Per sweep, every value it can take: ``full_values`` then the CI ``values`` not among them.

    Grid indices count in these axes, so a case id means the same values in a CI-sized and a full
    study (``-s001`` is the same grid point in both).
    """
    axes = []
    for sw in scn.data["study"]["sweep"]:
        ax = list(sw["full_values"])
        ax += [v for v in sw["values"] if v not in ax]
        axes.append(ax)
    return axes


def _grid(scn: Scenario, full: bool) -> list[tuple[int, dict[str, Any]]]:
    sweeps = scn.data["study"]["sweep"]
    if not sweeps:
        return [(0, {})]
    axes = _axes(scn)
    chosen = [sw["full_values"] if full else sw["values"] for sw in sweeps]
    points = []
    for combo in itertools.product(*chosen):
        p: dict[str, Any] = {}
        gi = 0
        for sw, ax, v in zip(sweeps, axes, combo):
            gi = gi * len(ax) + ax.index(v)
            for k in sw["keys"]:
                p[k] = v
        points.append((gi, p))
    return points


def count_cases(scn: Scenario, *, full: bool = False) -> int:
    """Number of cases :func:`iter_cases` yields (without building them)."""
    st = scn.data["study"]
    n_grid = 1
    for sw in st["sweep"]:
        n_grid *= len(sw["full_values"] if full else sw["values"])
    n_draw = (st["full_draws"] if full else st["draws"]) if st["draw"] else 0
    return n_grid * max(n_draw, 1)


def iter_cases(scn: Scenario, *, full: bool = False, ci: bool | None = None) -> Iterator[Case]:
    """Yield the cases of a study one by one (grid-major, draws inner), lazily.

    Parameters
    ----------
    scn : Scenario
    full : bool
        Use ``full_draws`` and each sweep's ``full_values`` instead of the CI-sized ``draws`` and
        ``values``.
    ci : bool, optional
        Mark the cases to use the scenario's CI-sized settings (``[scenario.ci]``); default
        ``not full``.
    """
    st = scn.data["study"]
    grid = _grid(scn, full)
    n_draw = (st["full_draws"] if full else st["draws"]) if st["draw"] else 0
    ci = (not full) if ci is None else bool(ci)
    draws_cache: dict[int, dict[str, Any]] = {}
    for gi, point in grid:
        for j in (range(n_draw) if n_draw else [None]):
            params = dict(point)
            if j is not None:
                if j not in draws_cache:
                    draws_cache[j] = draw_values(scn, j)
                params.update(draws_cache[j])
            cid = scn.name
            if st["sweep"]:
                cid += f"-s{gi:03d}"
            if j is not None:
                cid += f"-d{j:04d}"
            yield Case(case_id=cid, scenario=scn.name, file=scn.file, raw=scn.raw, params=params,
                       seed=_case_seed(scn.seed, 0 if j is None else j),
                       grid_index=gi if st["sweep"] else None, draw_index=j, ci=ci)
        if len(draws_cache) > 4096:
            draws_cache.clear()


def expand(scn: Scenario | str, *, full: bool = False, ci: bool | None = None,
           check: bool = True) -> list[Case]:
    """All cases of a study (see :func:`iter_cases`); a path is loaded first.

    With ``check=True`` every case's scenario is re-validated with its overrides applied (schema and
    the simulator's signal/instrument/actuator/fault factories), so a sweep value out of range is
    reported now (naming the key and the case) rather than in a worker.
    """
    if not isinstance(scn, Scenario):
        scn = load_scenario(scn)
    cases = list(iter_cases(scn, full=full, ci=ci))
    if check:
        for c in cases:
            check_case(c)
    return cases


def check_case(case: Case) -> Scenario:
    """:func:`case_scenario` plus the simulator's checks of its signal, instrument, actuator and
    fault specs (no model needed); errors on a key the case sets name the case."""
    from .checks import _check_specs

    sc = case_scenario(case)
    try:
        _check_specs(sc)
    except ScenarioError as e:
        raise _blame(e, case) from None
    return sc


def case_scenario(case: Case) -> Scenario:
    """The validated scenario of one case: the file's data with the case's overrides applied.

    A value that makes the scenario invalid raises :class:`ScenarioError` naming the overridden key
    and the case.
    """
    raw = plain_copy(case.raw)
    if _moves_plant_matrix(case) and not raw.get("controller_model"):
        # the controllers keep the file's matrix: a study of the plant's elements is model mismatch
        raw["controller_model"] = plain_copy(case.raw["plant"])
    for k, v in case.params.items():
        set_path(raw, k, v, file=case.file)
    try:
        return parse_scenario(raw, file=case.file, default_name=case.scenario)
    except ScenarioError as e:
        raise _blame(e, case) from None


def _moves_plant_matrix(case: Case) -> bool:
    return any(k.startswith("plant.elements.") for k in case.params)


def _blame(e: ScenarioError, case: Case) -> ScenarioError:
    """Add the case id to an error on a key path the case overrides (or a key inside it)."""
    if e.key and any(e.key == k or e.key.startswith(k + ".") or k.startswith(e.key + ".")
                     for k in case.params):
        return e.replace(note=f"value set by case {case.case_id}", file=case.file)
    return e

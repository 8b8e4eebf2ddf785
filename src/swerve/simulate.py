"""The training stage's simulation of one Galaxy design point, and its configuration.

One design point is one Galaxy (the inferred Galaxy parameters at that point, the others
fixed): integrate one trajectory bank (:func:`swerve.bank.build_bank`), then, by reweighting
only (:mod:`swerve.bank`), build the selected present-day population at ``points_per_galaxy``
launch-model points and compute their summaries (:mod:`swerve.summaries`).  The emulator
learns the summaries as a function of (Galaxy parameters, launch parameters).

The training configuration is a TOML file (schema :data:`TRAIN_SCHEMA`; ``swerve train
--template`` prints it with every key documented).  Its sections:

``[galaxy]``    ``model``, ``halo_flattening``, and tables ``infer`` (name = [low, high]) and
                ``fixed`` (name = value) of the declared Galaxy parameters;
``[launch]``    ``model`` (``"power-law"``: :class:`~swerve.launch.BoundedPowerLawSpeed`),
                ``infer`` / ``fixed`` tables of its parameters, ``points_per_galaxy``,
                ``flight_time_max`` (Myr);
``[selection]`` the cuts of :class:`~swerve.selection.Selection`: radius range, outgoing, speed,
                and ``vlos_min``, a survey's cut on the measured heliocentric line-of-sight
                velocity (km/s, in the ``[frame]`` solar parameters), applied here to the true
                value (the training population has no errors; the likelihood treats the
                difference, :mod:`swerve.likelihood`). The summaries are computed in the
                octant, or on all 8 reflections of every sample with ``vlos_min`` (a
                heliocentric cut is not reflection-symmetric);
``[summaries]`` :class:`~swerve.summaries.SummarySpec`;
``[bank]``      orbits per design point, flight-time grid, proposal, tolerances;
``[design]``    method, size, held-out size, master seed;
``[emulator]``  kernel, PCA components, restarts;
``[frame]``     the solar-parameter set recorded with the emulator.
"""

from __future__ import annotations

import time

import numpy as np
from scipy.stats import qmc

from .bank import build_bank
from .config import Key, Schema, Section, config_hash, load_config, validate
from .fileio import did_you_mean
from .frames import SolarParameters
from .galaxy import DEFAULT_GALAXY, Galaxy
from .launch import BoundedPowerLawSpeed
from .population import select_bank
from .selection import Selection
from .summaries import SummarySpec, compute_summaries

LAUNCH_MODELS = ("power-law",)

TRAIN_SCHEMA = Schema("train", (
    Section("galaxy", (
        Key("model", "str", DEFAULT_GALAXY, doc="named Galaxy model the fixed parameters start from"),
        Key("halo_flattening", "str", "density", choices=("density", "potential"),
            doc="flatten the NFW halo in the density (physical) or in the potential (fast)"),
        Key("infer", "table", {"q_y": [0.7, 1.3], "q_z": [0.7, 1.3]},
            doc="inferred Galaxy parameters: name = [low, high] in the parameter's unit"),
        Key("fixed", "table", {}, doc="Galaxy parameters fixed to a value other than the model's"),
    )),
    Section("launch", (
        Key("model", "str", "power-law", choices=LAUNCH_MODELS, doc="launch-speed model"),
        Key("infer", "table", {"slope": [-1.5, 0.5]}, doc="inferred launch parameters: name = [low, high]"),
        Key("fixed", "table", {"v_min": 700.0, "v_max": 3000.0}, doc="fixed launch parameters"),
        Key("points_per_galaxy", "int", 4, min=1, doc="launch-model points per Galaxy design point"),
        Key("flight_time_max", "float", 300.0, min=1.0, doc="longest flight time, Myr (constant ejection rate)"),
    )),
    Section("selection", (
        Key("r_min", "float", 10.0, min=0.0, doc="minimum galactocentric radius, kpc"),
        Key("r_max", "float", 250.0, min=0.0, doc="maximum galactocentric radius, kpc"),
        Key("outgoing", "bool", True, doc="keep only outgoing stars (v_r > 0)"),
        Key("v_min", "float", 0.0, min=0.0, doc="minimum galactocentric speed, km/s (0: no cut)"),
        Key("vlos_min", "float", None,
            doc="a survey's cut on the measured heliocentric line-of-sight velocity, km/s (applied to the true "
                "value in training; fit catalogs selected with the same cut on the measured value; unset: no cut)"),
    )),
    Section("summaries", (
        Key("r_edges", "list[float]", [10.0, 20.0, 35.0, 60.0, 100.0, 250.0], min=0.0, doc="radius cells, kpc"),
        Key("lat_edges", "list[float]", [0.0, 30.0, 60.0, 90.0], min=0.0, max=90.0,
            doc="|galactocentric latitude| cells, deg"),
        Key("min_ess", "float", 30.0, min=1.0, doc="smallest effective sample size per cell"),
        Key("n_boot", "int", 48, min=8, doc="bootstrap replicates for the simulation noise"),
        Key("vr_edges", "list[float]", [], min=0.0,
            doc="edges of the per-cell v_r histogram, km/s, from 0 ([]: v_r modelled by the cell Gaussian)"),
    )),
    Section("bank", (
        Key("n_orbits", "int", 4000, min=16, doc="orbits per design point (positive octant)"),
        Key("dt", "float", 1.0, min=0.01, doc="flight-time step of the stored samples, Myr"),
        Key("v_lo", "float", 500.0, min=1.0, doc="lowest proposal launch speed, km/s"),
        Key("v_hi", "float", 5000.0, min=1.0, doc="highest proposal launch speed, km/s"),
        Key("rtol", "float", 1e-9, min=1e-14, max=1e-4, doc="integrator relative tolerance"),
        Key("replicates", "int", 8, min=1, doc="independent sub-banks (own Sobol scramble) for the simulation "
            "noise; 1: Poisson bootstrap over orbits"),
    )),
    Section("design", (
        Key("method", "str", "sobol", choices=("sobol", "lhs"), doc="space-filling design"),
        Key("size", "int", 64, min=2, doc="Galaxy design points"),
        Key("held_out_size", "int", 16, min=1, doc="held-out Galaxy design points (--held-out)"),
        Key("seed", "int", 20261201, min=0, doc="master seed"),
    )),
    Section("emulator", (
        Key("kernel", "str", "matern52", choices=("matern52", "rbf"), doc="GP kernel"),
        Key("n_pca", "int", 0, min=0, doc="PCA components of the outputs (0: one GP per output)"),
        Key("n_restarts", "int", 2, min=0, doc="optimizer restarts per GP"),
        Key("scale_azimuthal", "bool", False,
            doc="emulate the v_pf statistics divided by (1/q_y^2 - 1), so that they vanish at q_y = 1 "
            "(needs q_y inferred)"),
    )),
    Section("frame", (
        Key("solar", "str", "v4.0", doc="solar-parameter set recorded with the emulator"),
    )),
))


def simulation_hash(cfg) -> str:
    """Hash of what a training run's simulations depend on: the validated configuration without
    its ``[emulator]`` section, so that refitting the emulator another way (``swerve train`` on
    the same run folder with other ``[emulator]`` settings) reuses the simulations. Run folders
    (``run.json``, every point file) carry this hash; the emulator records the full
    :func:`swerve.config.config_hash` too."""
    return config_hash({k: v for k, v in cfg.items() if k != "emulator"})


class TrainingSetup:
    """A validated training configuration, resolved against the parameter declarations."""

    def __init__(self, cfg: dict, source: str = "<config>"):
        self.cfg = cfg
        self.source = source
        g = cfg["galaxy"]
        base = Galaxy.from_name(g["model"], halo_flattening=g["halo_flattening"])
        self.galaxy_decl = {p.name: p for p in base.parameters}
        self.galaxy_infer = self._bounds(g["infer"], self.galaxy_decl, "[galaxy] infer")
        self.galaxy_fixed = self._fixed(g["fixed"], self.galaxy_decl, "[galaxy] fixed")
        clash = set(self.galaxy_infer) & set(self.galaxy_fixed)
        if clash:
            raise ValueError(f"{source}: parameter {sorted(clash)[0]} is both inferred and fixed in [galaxy]")
        # validate the fixed Galaxy now (a bad fixed value fails here, not in a worker)
        Galaxy.from_name(g["model"], halo_flattening=g["halo_flattening"], **self.galaxy_fixed)
        for name, (lo, hi) in self.galaxy_infer.items():
            self.galaxy_decl[name].validate(lo)
            self.galaxy_decl[name].validate(hi)

        lc = cfg["launch"]
        self.launch_cls = BoundedPowerLawSpeed
        self.launch_decl = {p.name: p for p in BoundedPowerLawSpeed.PARAMETERS}
        self.launch_infer = self._bounds(lc["infer"], self.launch_decl, "[launch] infer")
        self.launch_fixed = self._fixed(lc["fixed"], self.launch_decl, "[launch] fixed")
        for name, (lo, hi) in self.launch_infer.items():
            self.launch_decl[name].validate(lo)
            self.launch_decl[name].validate(hi)
        self.points_per_galaxy = lc["points_per_galaxy"]
        self.flight_time_max = lc["flight_time_max"]

        s = cfg["selection"]
        self.selection = Selection(r_min=s["r_min"], r_max=s["r_max"], outgoing=s["outgoing"],
                                   v_min=s["v_min"] or None, vlos_min=s.get("vlos_min"))
        sm = cfg["summaries"]
        try:
            self.spec = SummarySpec(r_edges=tuple(sm["r_edges"]), lat_edges=tuple(sm["lat_edges"]),
                                    min_ess=sm["min_ess"], n_boot=sm["n_boot"], vr_edges=tuple(sm["vr_edges"]))
        except ValueError as e:
            raise ValueError(f"{source}: {e}") from None
        if self.spec.r_edges[0] < self.selection.r_min or self.spec.r_edges[-1] > self.selection.r_max:
            raise ValueError(f"{source}: [summaries] r_edges must lie inside [selection] r_min..r_max")
        b = cfg["bank"]
        if not b["v_lo"] < b["v_hi"]:
            raise ValueError(f"{source}: [bank] v_lo = {b['v_lo']:g} must be below v_hi = {b['v_hi']:g}")

    @staticmethod
    def _suggest(name, decl):
        return did_you_mean(name, decl, list_all=True)

    def _bounds(self, table, decl, where):
        out = {}
        for name, value in table.items():
            if name not in decl:
                raise ValueError(f"{self.source}: unknown parameter {where}.{name}{self._suggest(name, decl)}")
            if not (isinstance(value, (list, tuple)) and len(value) == 2
                    and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
                    and value[0] < value[1]):
                raise ValueError(f"{self.source}: {where}.{name} = {value!r}: expected [low, high] with low < high")
            out[name] = (float(value[0]), float(value[1]))
        return out

    def _fixed(self, table, decl, where):
        out = {}
        for name, value in table.items():
            if name not in decl:
                raise ValueError(f"{self.source}: unknown parameter {where}.{name}{self._suggest(name, decl)}")
            out[name] = decl[name].validate(value)
        return out

    # ---- names and bounds ---------------------------------------------------------------
    @property
    def galaxy_names(self) -> list[str]:
        return list(self.galaxy_infer)

    @property
    def launch_names(self) -> list[str]:
        return list(self.launch_infer)

    @property
    def parameter_names(self) -> list[str]:
        """The emulator's inputs: inferred Galaxy parameters, then launch parameters."""
        return self.galaxy_names + self.launch_names

    @property
    def bounds(self) -> np.ndarray:
        return np.array([self.galaxy_infer[n] for n in self.galaxy_names]
                        + [self.launch_infer[n] for n in self.launch_names])

    @property
    def units(self) -> list[str]:
        decl = {**self.galaxy_decl, **self.launch_decl}
        return [decl[n].unit for n in self.parameter_names]

    def galaxy_at(self, theta: dict):
        g = self.cfg["galaxy"]
        params = dict(self.galaxy_fixed)
        params.update({n: theta[n] for n in self.galaxy_names})
        return Galaxy.from_name(g["model"], halo_flattening=g["halo_flattening"], **params)

    def launch_at(self, values: dict):
        params = dict(self.launch_fixed)
        params.update(values)
        return self.launch_cls(**params)

    def metadata(self) -> dict:
        """What an emulator records about how it was trained (JSON-safe)."""
        return {
            "config_hash": config_hash(self.cfg),
            "simulation_hash": simulation_hash(self.cfg),
            "config": self.cfg,
            "galaxy": {"model": self.cfg["galaxy"]["model"], "halo_flattening": self.cfg["galaxy"]["halo_flattening"],
                       "fixed": self.galaxy_fixed,
                       "base": self.galaxy_at({n: 0.5 * (lo + hi) for n, (lo, hi) in self.galaxy_infer.items()}).to_dict()},
            "launch": {"model": self.cfg["launch"]["model"], "fixed": self.launch_fixed,
                       "flight_time_max": self.flight_time_max},
            "selection": self.selection.to_dict(),
            "summaries": self.spec.to_dict(),
            "solar": SolarParameters.from_name(self.cfg["frame"]["solar"]).to_dict(),
        }


def load_training_config(path) -> TrainingSetup:
    """Read and validate a training TOML file."""
    return TrainingSetup(load_config(path, TRAIN_SCHEMA), source=str(path))


def training_setup_from_dict(d: dict, source: str = "<config>") -> TrainingSetup:
    return TrainingSetup(validate(d, TRAIN_SCHEMA, source=source), source=source)


def launch_points(setup: TrainingSetup, seed) -> np.ndarray:
    """The launch-parameter points of one design point: a scrambled Sobol / LHS sample of the
    launch bounds, ``(points_per_galaxy, n_launch)``, from the point's own seed."""
    d = len(setup.launch_names)
    if d == 0:
        return np.zeros((1, 0))
    rng = np.random.default_rng(seed)
    u = qmc.LatinHypercube(d=d, seed=rng).random(setup.points_per_galaxy)
    lo = np.array([setup.launch_infer[n][0] for n in setup.launch_names])
    hi = np.array([setup.launch_infer[n][1] for n in setup.launch_names])
    return lo + u * (hi - lo)


def simulate_point(cfg: dict, theta: dict, seed) -> dict[str, np.ndarray]:
    """The training task of one Galaxy design point (picklable: plain config dict in).

    Returns arrays: ``launch`` (L, n_launch), ``values`` and ``noise_var`` (L, n_outputs),
    ``ess`` (L, n_cells), ``bank_seconds``, ``max_energy_error``.
    """
    setup = TrainingSetup(cfg)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    s_bank, s_launch, s_boot = ss.spawn(3)
    galaxy = setup.galaxy_at(theta)
    b = cfg["bank"]
    R = int(b.get("replicates", 1))
    if b["n_orbits"] < 16 * R:
        raise ValueError(f"[bank] n_orbits = {b['n_orbits']} is too few for {R} replicates (at least 16 each)")
    t0 = time.perf_counter()
    banks = [
        build_bank(
            galaxy, b["n_orbits"] // R, int(ss_r.generate_state(1)[0]), t_max=setup.flight_time_max, dt=b["dt"],
            v_lo=b["v_lo"], v_hi=b["v_hi"], r_min_store=setup.spec.r_edges[0], r_max=setup.spec.r_edges[-1],
            rtol=b["rtol"],
        )
        for ss_r in (s_bank.spawn(R) if R > 1 else [s_bank])
    ]
    t_bank = time.perf_counter() - t0
    pts = launch_points(setup, s_launch)
    rng = np.random.default_rng(s_boot)
    values, noise, ess = [], [], []
    # a heliocentric cut (vlos_min) is not reflection-symmetric: all 8 reflections, weight 1/8 each;
    # mirroring and cuts are made once per bank, the launch points only reweight
    helio = setup.selection.needs_heliocentric
    views = [select_bank(bk, setup.selection, galaxy=galaxy, mirror="all" if helio else "none",
                         solar=cfg["frame"]["solar"] if helio else None) for bk in banks]
    for row in pts:
        launch = setup.launch_at(dict(zip(setup.launch_names, row)))
        parts = [v.population(launch, flight_time_max=setup.flight_time_max) for v in views]
        offset = np.cumsum([0] + [bk.n_orbits for bk in banks])
        pos = np.concatenate([p.pos for p in parts])
        vel = np.concatenate([p.vel for p in parts])
        # each sub-bank's weights are per its own orbit count: pool them with equal shares
        w = np.concatenate([p.weight / R for p in parts])
        orb = np.concatenate([p.orbit + offset[j] for j, p in enumerate(parts)])
        rep = np.concatenate([np.full(p.n, j) for j, p in enumerate(parts)]) if R > 1 else None
        res = compute_summaries(setup.spec, pos, vel, w, orb, rng, replicate=rep)
        values.append(res.values)
        noise.append(res.noise_var)
        ess.append(res.ess)
    max_de = max(bk.max_energy_error for bk in banks)
    return {
        "launch": np.asarray(pts, dtype=float),
        "values": np.asarray(values),
        "noise_var": np.asarray(noise),
        "ess": np.asarray(ess),
        "bank_seconds": np.array(t_bank),
        "max_energy_error": np.array(max_de),
    }


def training_table(setup: TrainingSetup, theta_gal: np.ndarray, outputs: dict):
    """Stack collected design points into emulator training arrays: inputs (n, d) =
    (Galaxy parameters repeated per launch point, launch parameters), outputs and noise."""
    L = outputs["values"].shape[1]
    g = np.repeat(np.asarray(theta_gal, dtype=float), L, axis=0)
    lp = outputs["launch"].reshape(-1, outputs["launch"].shape[-1])
    X = np.concatenate([g, lp], axis=1)
    Y = outputs["values"].reshape(-1, outputs["values"].shape[-1])
    V = outputs["noise_var"].reshape(-1, outputs["noise_var"].shape[-1])
    return X, Y, V

"""Problem files: load a TOML file, validate every key, return a frozen :class:`Problem`.

Every mistake in a file raises :class:`ProblemError` with one line naming the file,
the key and what is expected; the command line turns it into exit code 2. The schema is
the one documented in README.md ("Problem file reference").
"""

from __future__ import annotations

import copy
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from topopt.grid import AXES, Grid

DIRECTIONS_2D = ("+x", "-x", "+y", "-y")
DIRECTIONS_3D = DIRECTIONS_2D + ("+z", "-z")


class ProblemError(ValueError):
    """A problem file (or dict) that cannot be used; the message is one line."""


@dataclass(frozen=True)
class Material:
    """Isotropic linear-elastic solid and the SIMP void stiffness."""

    youngs_modulus: float
    poisson_ratio: float
    void_stiffness: float = 1e-9
    mass_density: float | None = None

    def __post_init__(self) -> None:
        _field_in(self, "youngs_modulus", 0.0, math.inf, low_open=True)
        _field_in(self, "poisson_ratio", -1.0, 0.5, low_open=True, high_open=True)
        _field_in(self, "void_stiffness", 0.0, 1.0, low_open=True, high_open=True)
        if self.mass_density is not None:
            _field_in(self, "mass_density", 0.0, math.inf, low_open=True)


@dataclass(frozen=True)
class Restraint:
    """Zero displacement of the listed components on the selected nodes."""

    where: Mapping
    fix: tuple[str, ...]
    nodes: np.ndarray = field(repr=False, compare=False)


@dataclass(frozen=True)
class Load:
    """A total force split equally over the selected nodes, in load case ``case``."""

    where: Mapping
    force: tuple[float, ...]
    case: str
    nodes: np.ndarray = field(repr=False, compare=False)


@dataclass(frozen=True)
class Projection:
    """Heaviside projection settings (used when ``[optimize.projection]`` is present)."""

    beta_start: float = 1.0
    beta_max: float = 32.0
    eta: float = 0.5
    every: int = 40
    robust_delta: float = 0.25
    stall_change: float = 0.0
    preserve_volume: bool = False


@dataclass(frozen=True)
class OptimizeSettings:
    """Settings of the optimisation loop."""

    volume_fraction: float
    filter_radius: float
    penalty: float = 3.0
    method: str = "oc"
    max_iterations: int = 200
    change_tolerance: float = 0.01
    compliance_tolerance: float = 0.0
    move_limit: float = 0.2
    solver: str = "auto"
    checkpoint_every: int = 10
    projection: Projection | None = None
    min_member_size: float | None = None
    #: results folder (or its result.npz) whose design starts the run; absolute path
    start_from: str | None = None

    def __post_init__(self) -> None:
        _field_in(self, "volume_fraction", 0.0, 1.0, low_open=True, high_open=True)
        _field_in(self, "filter_radius", 0.0, math.inf, low_open=True)
        _field_in(self, "penalty", 1.0, 10.0)
        _field_in(self, "max_iterations", 1, 100000, integer=True)
        _field_in(self, "change_tolerance", 0.0, 1.0, low_open=True)
        _field_in(self, "compliance_tolerance", 0.0, 0.1)
        _field_in(self, "move_limit", 0.0, 1.0, low_open=True)
        _field_in(self, "checkpoint_every", 1, math.inf, integer=True)
        if self.min_member_size is not None:
            _field_in(self, "min_member_size", 0.0, math.inf, low_open=True)
        from topopt.optimizers import OPTIMIZERS

        if self.method not in METHODS or self.method not in OPTIMIZERS:
            raise ValueError(f"OptimizeSettings.method: expected one of "
                             f"{', '.join(repr(m) for m in METHODS)}, got {self.method!r}")
        if not isinstance(self.solver, str):
            raise TypeError(f"OptimizeSettings.solver: expected a string, got {self.solver!r}")
        if self.start_from is not None and not isinstance(self.start_from, str):
            raise TypeError(f"OptimizeSettings.start_from: expected a path string, "
                            f"got {self.start_from!r}")


@dataclass(frozen=True)
class BuildSettings:
    """Build direction, overhang angle, plate position and how keep-in regions print.

    ``direction`` is ``"none"`` (printability filter off), an axis name such as ``"+y"``,
    or a tuple of 2 (3) numbers (any non-zero length). ``plate_offset`` raises the build
    plate along the direction from the domain's lowest corner (length unit).
    ``keep_in`` is ``"held"`` (the design must hold keep-in regions up; default) or
    ``"supported"`` (keep-in regions print whatever lies below; supports go under them).
    ``smooth_max_power`` is the exponent P of the printability filter's smooth maximum.
    """

    direction: str | tuple[float, ...] = "none"
    overhang_angle: float = 45.0
    plate_offset: float = 0.0
    keep_in: str = "held"
    smooth_max_power: float = 80.0

    @property
    def active(self) -> bool:
        """Whether a build direction is set (the printability filter is on)."""
        return not (isinstance(self.direction, str) and self.direction == "none")


@dataclass(frozen=True)
class UnitSystem:
    """A consistent set of units: lengths, forces, stresses and the mass unit they imply.

    ``metres_per_length`` and ``kg_per_mass`` convert to SI; masses are reported in kg.
    """

    name: str
    length: str
    force: str
    stress: str
    mass: str
    metres_per_length: float
    kg_per_mass: float


#: Unit systems a problem file may name in ``units`` (the first is the default).
UNIT_SYSTEMS: dict[str, UnitSystem] = {
    "mm-N-MPa-tonne": UnitSystem("mm-N-MPa-tonne", "mm", "N", "MPa", "tonne", 1e-3, 1000.0),
    "m-N-Pa-kg": UnitSystem("m-N-Pa-kg", "m", "N", "Pa", "kg", 1.0, 1.0),
}
DEFAULT_UNITS = "mm-N-MPa-tonne"


@dataclass(frozen=True)
class ProcessSettings:
    """Print-preparation values: the one source of their names and defaults.

    Defaults are typical magnitudes for metal powder-bed fusion in mm, not data of any
    machine; :meth:`defaults_for` converts the length-based ones to another unit system.
    ``powder_price`` is per kg in every unit system.
    """

    layer_thickness: float = 0.03  # length; 20-60 um common, 30 um typical (common practice)
    recoat_time_s: float = 10.0  # s per layer; about 5-15 s (from memory)
    part_rate: float = 10000.0  # length^3 per hour; about 5-20 cm^3/h for one laser (from memory)
    support_rate: float = 30000.0  # length^3 per hour; supports are scanned sparsely (from memory)
    support_fill: float = 0.2  # share of the supported column; about 10-30 % (from memory)
    overhead_h: float = 1.0  # h; set-up, heating, cooling
    # currency per kg: metal powders cost tens (steels, aluminium) to a few hundred
    # (titanium, nickel alloys) per kg (from memory; order of magnitude only)
    powder_price: float = 100.0
    tool_access: float = 2.0  # length; narrowest opening a support can be removed through

    #: exponent of the length unit in each field (the rest do not depend on it)
    LENGTH_POWER = {"layer_thickness": 1, "part_rate": 3, "support_rate": 3, "tool_access": 1}

    @classmethod
    def defaults_for(cls, units: str | UnitSystem = DEFAULT_UNITS) -> ProcessSettings:
        """The default values expressed in ``units`` (the dataclass defaults are in mm).

        Examples
        --------
        >>> ProcessSettings.defaults_for("m-N-Pa-kg").tool_access
        0.002
        """
        system = UNIT_SYSTEMS[units] if isinstance(units, str) else units
        scale = 1e-3 / system.metres_per_length  # one mm in the system's length unit
        base = cls()
        return cls(**{name: getattr(base, name) * scale ** cls.LENGTH_POWER.get(name, 0)
                      for name in cls.__dataclass_fields__})


@dataclass(frozen=True, eq=False)
class Problem:
    """A validated optimisation problem. Build variants with :func:`with_settings`."""

    name: str
    grid: Grid
    material: Material
    restraints: tuple[Restraint, ...]
    loads: tuple[Load, ...]
    passive_solid: np.ndarray = field(repr=False)
    passive_void: np.ndarray = field(repr=False)
    optimize: OptimizeSettings = field(repr=False)
    build: BuildSettings = field(default_factory=BuildSettings)
    process: ProcessSettings = field(default_factory=ProcessSettings)
    table: Mapping = field(default_factory=dict, repr=False)
    path: str = "<problem>"
    units: UnitSystem = field(default_factory=lambda: UNIT_SYSTEMS[DEFAULT_UNITS])

    def __post_init__(self) -> None:
        for name in ("passive_solid", "passive_void"):
            mask = getattr(self, name)
            if not isinstance(mask, np.ndarray) or mask.dtype != bool or mask.shape != self.grid.shape:
                raise ValueError(f"Problem.{name}: expected a boolean array of shape "
                                 f"{self.grid.shape}")
        for name, kind in (("material", Material), ("optimize", OptimizeSettings),
                           ("build", BuildSettings), ("process", ProcessSettings)):
            if not isinstance(getattr(self, name), kind):
                raise TypeError(f"Problem.{name}: expected a {kind.__name__}, got "
                                f"{type(getattr(self, name)).__name__}")

    @property
    def source(self) -> dict:
        """The problem as a table (the problem-file form), derived from the typed fields.

        Starts from the table the problem was read from (so regions and keys keep their
        spelling) and writes every typed setting that differs from it back, so a problem
        changed with ``dataclasses.replace`` writes, digests and varies as it now is.
        """
        return problem_table(self)

    @property
    def load_cases(self) -> tuple[str, ...]:
        """Names of the load cases in order of first appearance."""
        seen: list[str] = []
        for load in self.loads:
            if load.case not in seen:
                seen.append(load.case)
        return tuple(seen)

    def load_vectors(self) -> np.ndarray:
        """Global force vectors, shape (n_dofs, n_cases)."""
        cases = self.load_cases
        F = np.zeros((self.grid.n_dofs, len(cases)))
        d = self.grid.dim
        for load in self.loads:
            c = cases.index(load.case)
            per_node = np.asarray(load.force) / load.nodes.size
            for a in range(d):
                np.add.at(F[:, c], load.nodes * d + a, per_node[a])
        return F

    def fixed_dofs(self) -> np.ndarray:
        """Sorted unique restrained dof numbers."""
        d = self.grid.dim
        dofs = [r.nodes * d + AXES.index(a) for r in self.restraints for a in r.fix]
        return np.unique(np.concatenate(dofs))

    def free_dofs(self) -> np.ndarray:
        """Dofs left in the system after removing the restrained ones."""
        # a mask, not np.setdiff1d: that sorts all dofs (1.7 s at 1e6 H8 elements)
        free = np.ones(self.grid.n_dofs, dtype=bool)
        free[self.fixed_dofs()] = False
        return np.flatnonzero(free)


# ---------------------------------------------------------------------------- helpers


class _Reader:
    """Typed look-ups in a TOML table that report errors as FILE: key: expected ..."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, key: str, message: str) -> ProblemError:
        return ProblemError(f"{self.source}: {key}: {message}")

    def table(self, data: Mapping, key: str, allowed: set[str], *, required: bool = True) -> dict:
        value = _get(data, key)
        if value is None:
            if required:
                raise self.fail(key, "missing table; expected a [" + key + "] table")
            return {}
        if not isinstance(value, Mapping):
            raise self.fail(key, f"expected a table, got {describe_value(value)}")
        self.no_unknown(value, key, allowed)
        return dict(value)

    def no_unknown(self, value: Mapping, key: str, allowed: set[str]) -> None:
        for k in value:
            if k not in allowed:
                name = f"{key}.{k}" if key else k
                raise self.fail(name, f"unknown key; expected one of {', '.join(sorted(allowed))}")

    def number(self, table: Mapping, key: str, name: str, *, default: Any = ..., low=None,
               high=None, low_open=False, high_open=False, integer=False) -> Any:
        if key not in table:
            if default is ...:
                raise self.fail(name, "missing; expected a number")
            return default
        v = table[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.fail(name, f"expected a {'whole number' if integer else 'number'}, got {describe_value(v)}")
        if integer and not isinstance(v, int):
            raise self.fail(name, f"expected a whole number, got {v!r}")
        if not math.isfinite(v):
            raise self.fail(name, f"expected a finite number, got {v!r}")
        lo_bad = low is not None and (v <= low if low_open else v < low)
        hi_bad = high is not None and (v >= high if high_open else v > high)
        if lo_bad or hi_bad:
            lo = "-inf" if low is None else low
            hi = "inf" if high is None else high
            interval = f"{'(' if low_open or low is None else '['}{lo}, {hi}{')' if high_open or high is None else ']'}"
            raise self.fail(name, f"expected a number in {interval}, got {v!r}")
        return int(v) if integer else float(v)

    def string(self, table: Mapping, key: str, name: str, *, default: Any = ...,
               choices: tuple[str, ...] | None = None) -> Any:
        if key not in table:
            if default is ...:
                raise self.fail(name, "missing; expected a string")
            return default
        v = table[key]
        if not isinstance(v, str):
            raise self.fail(name, f"expected a string, got {describe_value(v)}")
        if choices is not None and v not in choices:
            raise self.fail(name, f"expected one of {', '.join(repr(c) for c in choices)}, got {v!r}")
        return v

    def flag(self, table: Mapping, key: str, name: str, *, default: bool) -> bool:
        if key not in table:
            return default
        v = table[key]
        if not isinstance(v, bool):
            raise self.fail(name, f"expected true or false, got {describe_value(v)}")
        return v

    def numbers(self, value: Any, name: str, *, length: int | None = None) -> list[float]:
        if not isinstance(value, list) or any(
            isinstance(v, bool) or not isinstance(v, (int, float)) for v in value
        ):
            raise self.fail(name, f"expected a list of numbers, got {describe_value(value)}")
        if length is not None and len(value) != length:
            raise self.fail(name, f"expected {length} numbers, got {len(value)}")
        if not all(math.isfinite(v) for v in value):
            raise self.fail(name, "expected finite numbers")
        return [float(v) for v in value]


def _get(data: Mapping, key: str) -> Any:
    value: Any = data
    for part in key.split("."):
        if not isinstance(value, Mapping) or part not in value:
            return None
        value = value[part]
    return value


def describe_value(value: Any) -> str:
    """Short description of a parsed TOML value for error messages ("a list", ...)."""
    if isinstance(value, bool):
        return f"a boolean ({str(value).lower()})"
    if isinstance(value, Mapping):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, str):
        return f"a string ({value!r})"
    return f"{type(value).__name__} {value!r}"


def _region(r: _Reader, value: Any, name: str, dim: int) -> dict:
    if not isinstance(value, Mapping):
        raise r.fail(name, f"expected a table such as {{ x = [0.0, 0.0] }}, got {describe_value(value)}")
    allowed = set(AXES[:dim]) | {"center", "radius"} | ({"axis"} if dim == 3 else set())
    r.no_unknown(value, name, allowed)
    region: dict[str, Any] = {}
    for axis in AXES[:dim]:
        if axis in value:
            lo, hi = r.numbers(value[axis], f"{name}.{axis}", length=2)
            if lo > hi:
                raise r.fail(f"{name}.{axis}", f"expected [low, high] with low <= high, got {[lo, hi]}")
            region[axis] = [lo, hi]
    if ("center" in value) != ("radius" in value):
        raise r.fail(name, "a disk or cylinder needs both center and radius")
    if "center" in value:
        n_center = 2 if dim == 2 else (2, 3)
        center = r.numbers(value["center"], f"{name}.center")
        if (dim == 2 and len(center) != 2) or (dim == 3 and len(center) not in (2, 3)):
            raise r.fail(f"{name}.center", f"expected {n_center} coordinates, got {len(center)}")
        region["center"] = center
        region["radius"] = r.number(value, "radius", f"{name}.radius", low=0.0, low_open=True)
        if dim == 3:
            region["axis"] = r.string(value, "axis", f"{name}.axis", default="z", choices=AXES)
        elif "axis" in value:
            raise r.fail(f"{name}.axis", "only 3D cylinders take an axis")
    return region


def _list_of_tables(r: _Reader, data: Mapping, key: str) -> list[Mapping]:
    value = data.get(key, [])
    if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
        raise r.fail(key, f"expected an array of tables ([[{key}]]), got {describe_value(value)}")
    return value


#: Longest ``name`` (it titles pictures and tables).
MAX_NAME = 1000
#: Deepest nesting of tables and lists a problem or study file may have.
MAX_DEPTH = 32
#: Scales (force, stiffness, lengths and their products) must lie within
#: [1 / MAGNITUDE, MAGNITUDE]: far inside the double range (about 1e+-308), so sums over
#: millions of elements, squares and the solvers' intermediate values stay finite and
#: keep their precision (common practice: keep magnitudes well away from the limits).
MAGNITUDE = 1e100


def _field_in(obj, name: str, low, high, *, low_open: bool = False, high_open: bool = False,
              integer: bool = False) -> None:
    """Check one typed field on construction: ValueError / TypeError naming it."""
    value = getattr(obj, name)
    label = f"{type(obj).__name__}.{name}"
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"{label}: expected a number, got {value!r}")
    if integer and not float(value).is_integer():
        raise TypeError(f"{label}: expected a whole number, got {value!r}")
    bad = (not math.isfinite(value) or (value <= low if low_open else value < low)
           or (value >= high if high_open else value > high))
    if bad:
        raise ValueError(f"{label}: expected a number in {'(' if low_open else '['}{low}, "
                         f"{high}{')' if high_open else ']'}, got {value!r}")


def _plain(value: Any) -> Any:
    """Tuples as lists and numpy scalars as Python numbers (TOML data)."""
    if isinstance(value, (tuple, list)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


def _put(table: dict, key: str, value: Any, default: Any = ...) -> None:
    """Write a typed value into a table when it differs from what the table says."""
    value = _plain(value)
    if key in table:
        if table[key] != value:
            table[key] = value
    elif default is ... or value != _plain(default):
        table[key] = value


def problem_table(problem: Problem) -> dict:
    """The problem-file table of ``problem``, derived from its typed fields.

    Examples
    --------
    >>> # problem_table(dataclasses.replace(p, name="b"))["name"]
    """
    data = copy.deepcopy(dict(problem.table))
    grid = problem.grid
    _put(data, "name", problem.name, Path(problem.path).stem)
    _put(data, "units", problem.units.name, DEFAULT_UNITS)
    dom = data.setdefault("domain", {})
    _put(dom, "shape", list(grid.shape))
    _put(dom, "element_size", grid.element_size)
    if grid.dim == 2:
        _put(dom, "thickness", grid.thickness, 1.0)
    mat = data.setdefault("material", {})
    for key, default in (("youngs_modulus", ...), ("poisson_ratio", ...),
                         ("void_stiffness", 1e-9), ("mass_density", None)):
        value = getattr(problem.material, key)
        if value is None:
            mat.pop(key, None)
        else:
            _put(mat, key, value, default)
    # regions stay as the table gives them (their nodes are found from it when loading)
    restraints = []
    for rr, table in zip(problem.restraints, _tables(data, "restraints", len(problem.restraints)),
                         strict=True):
        table = dict(table)
        _put(table, "fix", list(rr.fix), list(AXES[:grid.dim]))
        restraints.append(table)
    data["restraints"] = restraints
    loads = []
    for load, table in zip(problem.loads, _tables(data, "loads", len(problem.loads)), strict=True):
        table = dict(table)
        _put(table, "force", list(load.force))
        _put(table, "case", load.case, "default")
        loads.append(table)
    data["loads"] = loads
    opt = data.setdefault("optimize", {})
    settings = problem.optimize
    radius_default = 1.5 * grid.element_size
    method_default = "mma" if problem.build.active else "oc"  # as the reader chooses
    for key, default in (("volume_fraction", ...), ("penalty", 3.0), ("method", method_default),
                         ("max_iterations", 200), ("change_tolerance", 0.01),
                         ("compliance_tolerance", 0.0), ("solver", "auto"),
                         ("checkpoint_every", 10)):
        _put(opt, key, getattr(settings, key), default)
    if settings.start_from is not None:
        opt["start_from"] = settings.start_from
    if settings.min_member_size is None:
        opt.pop("min_member_size", None)
        _put(opt, "filter_radius", settings.filter_radius, radius_default)
    else:
        _put(opt, "min_member_size", settings.min_member_size)
    # the projection the reader adds by itself with a build direction (see problem_from_dict)
    implied = (Projection(every=DEFAULT_BETA_EVERY, beta_max=DEFAULT_BETA_MAX)
               if problem.build.active and settings.min_member_size is None else None)
    if settings.projection is None and implied is not None:
        opt["projection"] = False  # the reader would otherwise add the default one
    elif settings.projection is None:
        opt.pop("projection", None)
    elif "projection" not in opt and settings.projection == implied:
        pass
    else:
        pt = opt.setdefault("projection", {})
        defaults = Projection()
        for key in Projection.__dataclass_fields__:
            _put(pt, key, getattr(settings.projection, key), getattr(defaults, key))
    _put(opt, "move_limit", settings.move_limit, _default_move_limit(problem.build, opt))
    bt = data.get("build", {})
    for key, default in (("direction", "none"), ("overhang_angle", 45.0), ("plate_offset", 0.0),
                         ("keep_in", "held"), ("smooth_max_power", 80.0)):
        _put(bt, key, getattr(problem.build, key), default)
    if bt:
        data["build"] = bt
    pr = data.get("process", {})
    defaults = ProcessSettings.defaults_for(problem.units)
    for key in ProcessSettings.__dataclass_fields__:
        _put(pr, key, getattr(problem.process, key), getattr(defaults, key))
    if pr:
        data["process"] = pr
    return data


def _tables(data: Mapping, key: str, n: int) -> list[Mapping]:
    items = data.get(key, [])
    items = list(items) if isinstance(items, list) else []
    return (items + [{}] * n)[:n]


def _warn_cut_load_paths(r: _Reader, grid: Grid, void: np.ndarray, restraints, loads) -> None:
    """Warn when passive void separates a load from every restraint.

    Elements outside passive void that share a node form one piece; a load on a piece
    with no restrained node can only be carried by the void stiffness, so the run ends
    with an enormous compliance. Valid input, but worth a line (a warning, not an error).
    """
    import warnings

    from scipy import ndimage

    if not void.any():
        return
    pieces, count = ndimage.label(~void, structure=np.ones((3,) * grid.dim, dtype=bool))
    if count <= 1:
        return
    node_piece = np.zeros(grid.n_nodes, dtype=np.int64)
    node_piece[grid.element_nodes.reshape(-1)] = np.repeat(pieces.ravel(), grid.element_nodes.shape[1])
    anchored = set(np.unique(node_piece[np.concatenate([rr.nodes for rr in restraints])]).tolist())
    anchored.discard(0)
    for i, load in enumerate(loads):
        loaded = set(np.unique(node_piece[load.nodes]).tolist()) - {0}
        if loaded and not loaded & anchored:
            warnings.warn(f"{r.source}: loads[{i}].where: passive void cuts this load off from "
                          "every restraint; only the void stiffness can carry it, so the "
                          "compliance will be enormous (check the [[passive]] regions)",
                          UserWarning, stacklevel=3)


def _check_budget(r: _Reader, data: Mapping, grid: Grid) -> None:
    """Refuse a problem whose memory estimate exceeds the cap (topopt.memory)."""
    from topopt.memory import check_memory

    opt = data.get("optimize") if isinstance(data.get("optimize"), Mapping) else {}
    radius = 1.5 * grid.element_size
    for key in ("filter_radius", "min_member_size"):
        value = opt.get(key)
        if isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0:
            radius = max(radius, float(value))
    solver = opt.get("solver") if isinstance(opt.get("solver"), str) else "auto"
    try:
        check_memory(grid.shape, filter_radius=radius, element_size=grid.element_size,
                     solver=solver, source=r.source)
    except ValueError as exc:
        raise ProblemError(str(exc)) from None


def _check_magnitudes(r: _Reader, grid: Grid, material: Material, loads) -> None:
    """Every scale of the model representable: refuse absurd numbers before any work.

    Checked: element size and the element volume, Young's modulus and the void
    stiffness, each force, the stiffness of one element (E h, or E t in 2D), and the
    displacement and compliance a force would give on one element of solid and of void.
    """
    low, high = 1.0 / MAGNITUDE, MAGNITUDE
    t = grid.thickness if grid.dim == 2 else grid.element_size
    log = math.log10

    def within(value_log: float) -> bool:
        return log(low) <= value_log <= log(high)

    h, E = grid.element_size, material.youngs_modulus
    checks = [
        ("domain.element_size", log(h), f"{h!r}"),
        ("domain.element_size", grid.dim * log(h) + (log(t) if grid.dim == 2 else 0.0),
         "an element volume of 1e%.0f"),
        ("material.youngs_modulus", log(E), f"{E!r}"),
        ("material.youngs_modulus", log(E) + log(t), "an element stiffness of 1e%.0f"),
        ("material.void_stiffness", log(E) + log(t) + log(material.void_stiffness),
         "a void stiffness of 1e%.0f"),
    ]
    if grid.dim == 2:
        checks.append(("domain.thickness", log(t), f"{t!r}"))
    for i, load in enumerate(loads):
        size = max(abs(f) for f in load.force)
        if size == 0:
            continue  # reported below as a zero force
        k = log(E) + log(t)
        checks += [
            (f"loads[{i}].force", log(size), f"{size!r}"),
            (f"loads[{i}].force", log(size) - k, "a displacement of order 1e%.0f"),
            (f"loads[{i}].force", 2 * log(size) - k - log(material.void_stiffness),
             "a compliance of order 1e%.0f on void"),
            (f"loads[{i}].force", 2 * log(size) - k, "a compliance of order 1e%.0f"),
        ]
    for key, value_log, what in checks:
        if not within(value_log):
            shown = what % value_log if "%" in what else what
            raise r.fail(key, f"{shown} is outside [1e-100, 1e100] with the other values "
                         "(element_size, youngs_modulus, void_stiffness, force); use units "
                         "that keep the numbers moderate")


def _check_depth(data: Any, source: str, *, error: type[ValueError] | None = None) -> None:
    """Refuse tables and lists nested deeper than :data:`MAX_DEPTH` (iteratively)."""
    stack = [(data, 0)]
    while stack:
        value, depth = stack.pop()
        if depth > MAX_DEPTH:
            raise (error or ProblemError)(f"{source}: nested deeper than {MAX_DEPTH} levels of "
                                          "tables or lists")
        if isinstance(value, Mapping):
            stack.extend((v, depth + 1) for v in value.values())
        elif isinstance(value, list):
            stack.extend((v, depth + 1) for v in value)


TOP_KEYS = {"name", "units", "domain", "material", "restraints", "loads", "passive", "optimize",
            "build", "process"}
OPTIMIZE_KEYS = {
    "volume_fraction", "filter_radius", "penalty", "method", "max_iterations",
    "change_tolerance", "compliance_tolerance", "move_limit", "solver", "checkpoint_every",
    "projection", "min_member_size", "start_from",
}
METHODS = ("oc", "mma")


def _start_path(r, opt: Mapping, source: str) -> str | None:
    """``optimize.start_from`` as an absolute path (relative ones from the problem's folder).

    Only the form is checked here; the design itself is read when a run starts
    (:func:`topopt.results.read_start_design`), so a saved problem stays readable after
    its start folder is gone.
    """
    value = r.string(opt, "start_from", "optimize.start_from", default=None)
    if value is None:
        return None
    if not value.strip() or "\0" in value:
        raise r.fail("optimize.start_from", "expected the path of a results folder or its "
                     "result.npz")
    path = Path(value).expanduser()
    if not path.is_absolute():
        base = Path(source).parent if source and not source.startswith("<") else Path.cwd()
        path = base / path
    return str(path.resolve())


def problem_from_dict(data: Mapping, *, source: str = "<problem>") -> Problem:
    """Validate a parsed problem table and build a :class:`Problem`.

    Parameters
    ----------
    data : mapping
        The parsed TOML document.
    source : str
        Name used in error messages (normally the file path).

    Raises
    ------
    ProblemError
        One line naming ``source``, the key and what is expected.

    Examples
    --------
    >>> p = problem_from_dict({
    ...     "domain": {"shape": [4, 2], "element_size": 1.0},
    ...     "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
    ...     "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
    ...     "loads": [{"where": {"x": [4.0, 4.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0]}],
    ...     "optimize": {"volume_fraction": 0.5},
    ... })
    >>> p.grid.shape, p.load_cases
    ((4, 2), ('default',))
    """
    r = _Reader(source)
    if not isinstance(data, Mapping):
        raise r.fail("(top level)", "expected a TOML document")
    _check_depth(data, source)
    r.no_unknown(data, "", TOP_KEYS)
    name = r.string(data, "name", "name", default=Path(source).stem)
    units = UNIT_SYSTEMS[r.string(data, "units", "units", default=DEFAULT_UNITS,
                                  choices=tuple(UNIT_SYSTEMS))]
    if len(name) > MAX_NAME:
        raise r.fail("name", f"expected at most {MAX_NAME} characters, got {len(name)}")

    dom = r.table(data, "domain", {"shape", "element_size", "thickness"})
    shape_raw = dom.get("shape")
    if (
        not isinstance(shape_raw, list)
        or len(shape_raw) not in (2, 3)
        or any(isinstance(n, bool) or not isinstance(n, int) for n in shape_raw)
    ):
        raise r.fail("domain.shape", f"expected 2 or 3 whole numbers such as [120, 60], got {shape_raw!r}")
    if any(n < 1 for n in shape_raw):
        raise r.fail("domain.shape", f"expected positive element counts, got {shape_raw!r}")
    if math.prod(shape_raw) > 50_000_000:  # Python integers: no wrap-round
        raise r.fail("domain.shape", f"expected at most 5e7 elements, got {math.prod(shape_raw)}")
    dim = len(shape_raw)
    h = r.number(dom, "element_size", "domain.element_size", low=0.0, low_open=True)
    if dim == 3 and "thickness" in dom:
        raise r.fail("domain.thickness", "only 2D domains take a thickness")
    thickness = r.number(dom, "thickness", "domain.thickness", default=1.0, low=0.0, low_open=True)
    grid = Grid(tuple(shape_raw), h, thickness)
    _check_budget(r, data, grid)

    mat = r.table(data, "material", {"youngs_modulus", "poisson_ratio", "void_stiffness", "mass_density"})
    material = Material(
        youngs_modulus=r.number(mat, "youngs_modulus", "material.youngs_modulus", low=0.0, low_open=True),
        poisson_ratio=r.number(mat, "poisson_ratio", "material.poisson_ratio", low=-1.0,
                               high=0.5, low_open=True, high_open=True),
        void_stiffness=r.number(mat, "void_stiffness", "material.void_stiffness", default=1e-9,
                                low=0.0, high=1.0, low_open=True, high_open=True),
        mass_density=r.number(mat, "mass_density", "material.mass_density", default=None,
                              low=0.0, low_open=True),
    )

    _check_magnitudes(r, grid, material, ())  # before any region is selected

    restraints = []
    items = _list_of_tables(r, data, "restraints")
    if not items:
        raise r.fail("restraints", "no restraint given; expected at least one [[restraints]] table")
    for i, item in enumerate(items):
        key = f"restraints[{i}]"
        r.no_unknown(item, key, {"where", "fix"})
        if "where" not in item:
            raise r.fail(f"{key}.where", "missing; expected a region such as { x = [0.0, 0.0] }")
        where = _region(r, item["where"], f"{key}.where", dim)
        fix = item.get("fix", list(AXES[:dim]))
        if not isinstance(fix, list) or not fix or any(f not in AXES[:dim] for f in fix):
            raise r.fail(f"{key}.fix", f"expected a list of {list(AXES[:dim])}, got {fix!r}")
        nodes = grid.select_nodes(where)
        if nodes.size == 0:
            raise r.fail(f"{key}.where", f"selects no node; the domain spans {_extent(grid)}")
        restraints.append(Restraint(where, tuple(dict.fromkeys(fix)), nodes))
    fixed_axes = {a for rr in restraints for a in rr.fix}
    if len(fixed_axes) < dim:
        missing = sorted(set(AXES[:dim]) - fixed_axes)
        raise r.fail("restraints", f"no restraint in {', '.join(missing)}; the part could move freely")
    if not _restraints_stop_rigid_motion(grid, restraints):
        raise r.fail("restraints", "the restrained nodes still let the part turn as a rigid body; "
                     "restrain more nodes (e.g. a whole edge or two separate points)")

    loads = []
    items = _list_of_tables(r, data, "loads")
    if not items:
        raise r.fail("loads", "no load given; expected at least one [[loads]] table")
    for i, item in enumerate(items):
        key = f"loads[{i}]"
        r.no_unknown(item, key, {"where", "force", "case"})
        if "where" not in item:
            raise r.fail(f"{key}.where", "missing; expected a region")
        if "force" not in item:
            raise r.fail(f"{key}.force", f"missing; expected {dim} force components")
        where = _region(r, item["where"], f"{key}.where", dim)
        force = r.numbers(item["force"], f"{key}.force", length=dim)
        case = r.string(item, "case", f"{key}.case", default="default")
        nodes = grid.select_nodes(where)
        if nodes.size == 0:
            raise r.fail(f"{key}.where",
                         f"selects no node (load outside the domain?); the domain spans {_extent(grid)}")
        loads.append(Load(where, tuple(force), case, nodes))

    solid = np.zeros(grid.shape, dtype=bool)
    void = np.zeros(grid.shape, dtype=bool)
    for i, item in enumerate(_list_of_tables(r, data, "passive")):
        key = f"passive[{i}]"
        r.no_unknown(item, key, {"where", "state"})
        if "where" not in item:
            raise r.fail(f"{key}.where", "missing; expected a region")
        where = _region(r, item["where"], f"{key}.where", dim)
        state = r.string(item, "state", f"{key}.state", choices=("solid", "void"))
        mask = grid.select_elements(where)
        if not mask.any():
            raise r.fail(f"{key}.where", f"selects no element centre; the domain spans {_extent(grid)}")
        # Later regions win, so a solid ring can be cut by a void hole listed after it.
        if state == "solid":
            solid |= mask
            void &= ~mask
        else:
            void |= mask
            solid &= ~mask

    _check_magnitudes(r, grid, material, loads)

    # A load on nodes that touch only passive void would act on nothing.
    touches_material = np.zeros(grid.n_nodes, dtype=bool)
    touches_material[grid.element_nodes[~void.ravel()].ravel()] = True
    for i, load in enumerate(loads):
        if not touches_material[load.nodes].all():
            raise r.fail(f"loads[{i}].where", "selects nodes surrounded by passive void; "
                         "the load would act on nothing (move it onto material)")
    _warn_cut_load_paths(r, grid, void, restraints, loads)
    # A load that does no work leaves compliance at zero: nothing to optimise.
    restrained = np.zeros(grid.n_dofs, dtype=bool)
    for rr in restraints:
        for axis in rr.fix:
            restrained[rr.nodes * dim + AXES.index(axis)] = True
    for i, load in enumerate(loads):
        if not any(load.force):
            raise r.fail(f"loads[{i}].force", "expected a non-zero force")
        if all(restrained[load.nodes * dim + a].all() for a in range(dim) if load.force[a]):
            raise r.fail(f"loads[{i}].where", "acts only on restrained nodes in the direction of "
                         "the force; the load would do no work")

    bt = r.table(data, "build", {"direction", "overhang_angle", "plate_offset", "keep_in",
                                 "smooth_max_power"}, required=False)
    build = BuildSettings(
        direction=_build_direction(r, bt, dim),
        overhang_angle=r.number(bt, "overhang_angle", "build.overhang_angle", default=45.0,
                                low=0.0, high=90.0, low_open=True, high_open=True),
        plate_offset=r.number(bt, "plate_offset", "build.plate_offset", default=0.0, low=0.0),
        keep_in=r.string(bt, "keep_in", "build.keep_in", default="held",
                         choices=("held", "supported")),
        # P must exceed log2 of the support-region size (the Q correction); 20 always does
        smooth_max_power=r.number(bt, "smooth_max_power", "build.smooth_max_power",
                                  default=80.0, low=20.0, high=400.0),
    )
    _check_overhang_angle(r, build.overhang_angle)

    opt = r.table(data, "optimize", OPTIMIZE_KEYS)
    vf = r.number(opt, "volume_fraction", "optimize.volume_fraction", low=0.0, high=1.0,
                  low_open=True, high_open=True)
    if (solid | void).all():
        raise r.fail("passive", "passive regions cover every element; nothing is left to design")
    n = grid.n_elements
    if solid.sum() / n > vf:
        raise r.fail("optimize.volume_fraction",
                     f"{vf} is below the share of passive solid elements ({solid.sum() / n:.3f})")
    if (n - void.sum()) / n < vf:
        raise r.fail("optimize.volume_fraction",
                     f"{vf} exceeds the share of elements outside passive void ({(n - void.sum()) / n:.3f})")
    projection = None
    projection_off = opt.get("projection") is False  # `projection = false`: none, not even the default
    if opt.get("projection") is True:
        raise r.fail("optimize.projection",
                     "expected an [optimize.projection] table, or false for no projection")
    if "projection" in opt and not projection_off:
        # looked up through the dotted name so errors name optimize.projection.<key>
        pt = r.table({"optimize": opt}, "optimize.projection",
                     set(Projection.__dataclass_fields__))
        projection = Projection(
            beta_start=r.number(pt, "beta_start", "optimize.projection.beta_start", default=1.0,
                                low=0.0, low_open=True),
            beta_max=r.number(pt, "beta_max", "optimize.projection.beta_max", default=32.0,
                              low=0.0, low_open=True),
            eta=r.number(pt, "eta", "optimize.projection.eta", default=0.5, low=0.0, high=1.0,
                         low_open=True, high_open=True),
            every=r.number(pt, "every", "optimize.projection.every", default=40, low=1, integer=True),
            robust_delta=r.number(pt, "robust_delta", "optimize.projection.robust_delta",
                                  default=0.25, low=0.0, high=0.5, low_open=True, high_open=True),
            stall_change=r.number(pt, "stall_change", "optimize.projection.stall_change",
                                  default=0.0, low=0.0, high=1.0, high_open=True),
            preserve_volume=r.flag(pt, "preserve_volume", "optimize.projection.preserve_volume",
                                   default=False),
        )
        if projection.beta_max < projection.beta_start:
            raise r.fail("optimize.projection.beta_max", "expected beta_max >= beta_start")
        if projection.preserve_volume and "eta" in pt:
            raise r.fail("optimize.projection.eta",
                         "is chosen at every iteration with preserve_volume = true; remove eta")
    if projection_off and "min_member_size" in opt:
        raise r.fail("optimize.projection", "min_member_size needs projection; remove "
                     "projection = false or min_member_size")
    if projection is None and build.active and "min_member_size" not in opt and not projection_off:
        # self-supporting runs converge to a crisp design with projection continuation
        # (beta doubled every 25 iterations up to 16; measured: without it they stopped
        # 20 % grey and unconverged, and with beta up to 32 MMA swung between printed
        # and cut-off keep-in regions; see the README)
        projection = Projection(every=DEFAULT_BETA_EVERY, beta_max=DEFAULT_BETA_MAX)
    optimize = OptimizeSettings(
        volume_fraction=vf,
        filter_radius=r.number(opt, "filter_radius", "optimize.filter_radius", default=1.5 * h,
                               low=0.0, low_open=True),
        penalty=r.number(opt, "penalty", "optimize.penalty", default=3.0, low=1.0, high=10.0),
        # MMA by default with a build direction: OC kept a few elements swinging by the
        # move limit there and stopped unconverged (measured; see the README)
        method=r.string(opt, "method", "optimize.method",
                        default="mma" if build.active else "oc", choices=METHODS),
        max_iterations=r.number(opt, "max_iterations", "optimize.max_iterations", default=200,
                                low=1, high=100000, integer=True),
        change_tolerance=r.number(opt, "change_tolerance", "optimize.change_tolerance",
                                  default=0.01, low=0.0, high=1.0, low_open=True),
        compliance_tolerance=r.number(opt, "compliance_tolerance",
                                      "optimize.compliance_tolerance", default=0.0, low=0.0,
                                      high=0.1),
        move_limit=r.number(opt, "move_limit", "optimize.move_limit",
                            default=_default_move_limit(build, opt), low=0.0, high=1.0,
                            low_open=True),
        solver=r.string(opt, "solver", "optimize.solver", default="auto"),
        checkpoint_every=r.number(opt, "checkpoint_every", "optimize.checkpoint_every",
                                  default=10, low=1, integer=True),
        projection=projection,
        min_member_size=r.number(opt, "min_member_size", "optimize.min_member_size",
                                 default=None, low=0.0, low_open=True),
        start_from=_start_path(r, opt, source),
    )
    if build.active and build.keep_in == "held" and solid.any() and optimize.method != "mma":
        raise r.fail("optimize.method", 'keep-in regions held up by the design need method = '
                     '"mma" (their printability is a constraint); or set build.keep_in = '
                     '"supported"')
    if optimize.min_member_size is not None:
        if optimize.method != "mma":
            raise r.fail("optimize.min_member_size",
                         'the robust formulation needs method = "mma" in [optimize]')
        if "filter_radius" in opt:
            raise r.fail("optimize.min_member_size",
                         "sets the filter radius itself; remove optimize.filter_radius")
        if projection is not None and projection.preserve_volume:
            raise r.fail("optimize.projection.preserve_volume",
                         "the robust formulation (min_member_size) fixes its thresholds; remove it")
        if optimize.min_member_size < 2.0 * h:
            raise r.fail("optimize.min_member_size",
                         f"expected at least two elements ({2.0 * h:g}), got {optimize.min_member_size!r}")
    from topopt.solvers import SOLVERS

    if optimize.solver not in set(SOLVERS) | {"auto"}:
        raise r.fail("optimize.solver", f"expected one of {sorted(set(SOLVERS) | {'auto'})}, got {optimize.solver!r}")

    pr = r.table(data, "process", set(ProcessSettings.__dataclass_fields__), required=False)
    defaults = ProcessSettings.defaults_for(units)
    process_values = {}
    for key in ProcessSettings.__dataclass_fields__:
        high = 1.0 if key == "support_fill" else None
        low_open = key not in ("recoat_time_s", "overhead_h", "powder_price")
        process_values[key] = r.number(pr, key, f"process.{key}", default=getattr(defaults, key),
                                       low=0.0, high=high, low_open=low_open)
    process = ProcessSettings(**process_values)

    return Problem(
        name=name, grid=grid, material=material, restraints=tuple(restraints),
        loads=tuple(loads), passive_solid=solid, passive_void=void, optimize=optimize,
        build=build, process=process, table=copy.deepcopy(dict(data)), path=source,
        units=units,
    )


#: Iterations per beta step and final beta of the default projection continuation with a
#: build direction.
DEFAULT_BETA_EVERY = 25
DEFAULT_BETA_MAX = 16.0


def _build_direction(r: _Reader, bt: Mapping, dim: int):
    """``build.direction``: "none", an axis name, or a vector of ``dim`` numbers."""
    directions = DIRECTIONS_2D if dim == 2 else DIRECTIONS_3D
    value = bt.get("direction", "none")
    if isinstance(value, str):
        return r.string(bt, "direction", "build.direction", default="none",
                        choices=directions + ("none",))
    if not isinstance(value, list):
        raise r.fail("build.direction", f"expected an axis name such as {directions[0]!r} or a "
                     f"vector of {dim} numbers, got {describe_value(value)}")
    vector = tuple(r.numbers(value, "build.direction", length=dim))
    from filters.direction import unit_vector

    try:
        unit_vector(vector, dim)
    except ValueError as exc:
        raise r.fail("build.direction", str(exc)) from None
    return vector


def _default_move_limit(build: BuildSettings, opt: Mapping) -> float:
    """0.2; 0.1 with projection; 0.05 with a build direction (measured).

    With a build direction (MMA, projection continuation, keep-in constraint) a bracket
    with a keep-in eye swung by the move limit 0.1 for 180 iterations at the final beta
    and did not converge in 300; at 0.05 it converged in 160 (0.3 % grey).

    With the printability filter, OC at 0.2 oscillated between a faded and an overfull
    design on the wall bracket built along -x; 0.1 converged on every direction of the
    bracket and the MBB beam. With projection, the robust MBB beam (min_member_size 3,
    MMA) lost a member of its eroded design right after beta reached 32 at 0.2 and went
    on smoothly at 0.1 (see tests/topopt/test_compare.py and test_projection_runs.py).
    """
    if build.active:
        return 0.05
    nonlinear = isinstance(opt.get("projection"), Mapping) or "min_member_size" in opt
    return 0.1 if nonlinear else 0.2


def _check_overhang_angle(r: _Reader, angle: float) -> None:
    """Reject angles the voxel grid cannot represent (rule owned by the printability filter)."""
    try:
        from filters.printability import enforced_overhang_angle
    except ImportError:  # the filter module is optional during development
        return
    try:
        enforced_overhang_angle(angle)
    except (ValueError, TypeError) as exc:
        raise r.fail("build.overhang_angle", str(exc).splitlines()[0]) from None


def _restraints_stop_rigid_motion(grid: Grid, restraints) -> bool:
    """Whether the fixed dofs suppress every rigid-body mode (else K is singular)."""
    d = grid.dim
    # Lattice units (node indices): the test is scale-free and cannot overflow.
    coords = np.indices(grid.node_shape).reshape(d, -1).T - 0.5 * np.array(grid.shape)
    pairs = [(0, 1)] if d == 2 else [(0, 1), (1, 2), (0, 2)]
    rows = []
    for rr in restraints:
        for axis in rr.fix:
            a = AXES.index(axis)
            x = coords[rr.nodes]
            # Value of each rigid mode (translations, then rotations) at these dofs.
            modes = [np.full(len(x), float(a == c)) for c in range(d)]
            for i, j in pairs:
                modes.append(-x[:, j] if a == i else x[:, i] if a == j else np.zeros(len(x)))
            rows.append(np.column_stack(modes))
    block = np.concatenate(rows) / np.array([1.0] * d + [max(grid.shape)] * len(pairs))
    return np.linalg.matrix_rank(block, tol=1e-9 * max(1.0, np.abs(block).max())) == block.shape[1]


def _extent(grid: Grid) -> str:
    return " x ".join(f"[0, {s:g}]" for s in grid.size) + " in " + ",".join(AXES[: grid.dim])


def read_toml(path: Path, *, what: str, error: type[ValueError] = ProblemError) -> dict:
    """Parse a TOML file as data; every failure is one line ``PATH: what went wrong``.

    Parameters
    ----------
    path : Path
        The file.
    what : str
        What the file should be, for messages ("a TOML problem file").
    error : type
        The ``ValueError`` subclass to raise.
    """
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise error(f"{path}: file not found") from None
    except IsADirectoryError:
        raise error(f"{path}: is a folder, expected {what}") from None
    except UnicodeDecodeError:
        raise error(f"{path}: not a UTF-8 text file") from None
    except OSError as exc:
        raise error(f"{path}: cannot be read ({exc.strerror})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"{path}: not valid TOML ({exc})") from None
    except RecursionError:
        raise error(f"{path}: nested deeper than {MAX_DEPTH} levels of tables or lists") from None
    _check_depth(data, str(path), error=error)
    return data


def load_problem(path: str | Path) -> Problem:
    """Read and validate a problem file.

    Parameters
    ----------
    path : str or Path
        A TOML problem file.

    Raises
    ------
    ProblemError
        If the file cannot be read, is not valid TOML, or fails validation.
    """
    path = Path(path)
    data = read_toml(path, what="a TOML problem file")
    return problem_from_dict(data, source=str(path))


def with_settings(problem: Problem, settings: Mapping[str, Any]) -> Problem:
    """A copy of ``problem`` with dotted keys replaced, validated again.

    Examples
    --------
    >>> p = load_problem("examples/mbb-beam.toml")
    >>> q = with_settings(p, {"build.direction": "+y", "optimize.volume_fraction": 0.3})
    >>> q.build.direction, q.optimize.volume_fraction, p.optimize.volume_fraction
    ('+y', 0.3, 0.5)
    """
    data = copy.deepcopy(dict(problem.source))
    for dotted, value in settings.items():
        parts = dotted.split(".")
        table = data
        for part in parts[:-1]:
            nxt = table.setdefault(part, {})
            if not isinstance(nxt, dict):
                raise ProblemError(f"{problem.path}: {dotted}: {part} is not a table")
            table = nxt
        table[parts[-1]] = value
    return problem_from_dict(data, source=problem.path)


# ---------------------------------------------------------------------------- writing


def to_toml(data: Mapping) -> str:
    """Write a problem table as TOML text (the subset problem files use).

    Examples
    --------
    >>> print(to_toml({"name": "a", "build": {"direction": "+y"}}).strip())
    name = "a"
    <BLANKLINE>
    [build]
    direction = "+y"
    """
    lines: list[str] = []
    _write_table(lines, "", data)
    return "\n".join(lines).strip() + "\n"


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write non-finite number {v!r} to TOML")
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, tuple):
        return _value(list(v))
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else _value(k)


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, Mapping) for x in v)


def _write_table(lines: list[str], prefix: str, table: Mapping) -> None:
    for k, v in table.items():
        if not isinstance(v, Mapping) and not _is_table_array(v):
            lines.append(f"{_key(k)} = {_value(v)}")
    for k, v in table.items():
        name = f"{prefix}.{_key(k)}" if prefix else _key(k)
        if isinstance(v, Mapping):
            lines.append("")
            lines.append(f"[{name}]")
            _write_table(lines, name, v)
        elif _is_table_array(v):
            for item in v:
                lines.append("")
                lines.append(f"[[{name}]]")
                for ik, iv in item.items():
                    lines.append(f"{_key(ik)} = {_value(iv)}")

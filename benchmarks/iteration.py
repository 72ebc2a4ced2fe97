"""Time one full optimisation iteration by stage, with baseline solvers in the same run.

Usage::

    python benchmarks/iteration.py --dims 3 --elements 1e4 6e4 2.5e5 --out results-3d.json
    python benchmarks/iteration.py --report results-2d.json results-3d.json \
        --markdown benchmarks/results.md

The problem is a cantilever (clamped at x = 0, a downward line load along the lower far
edge) on a grid of aspect 2:1 (2D) or 2:1:1 (3D), filter radius 1.5 elements, penalty 3,
void stiffness 1e-9. Two density fields: ``smooth`` (a smooth truss-like field with
large void regions, like a design half-way through an optimisation) and ``random``
(independent uniform densities per element). One iteration is: filter forward,
assembly, solve, sensitivities (element energies and filter backward), OC update. Each
iteration job runs two iterations with the same model and reports both: the first pays
for set-up (pattern, compilation caches, cold start), the second is the steady state
of an optimisation (warm start from the previous displacement). With ``--loop`` the
solve uses the design loop's looser tolerance (``multigrid.LOOP_TOLERANCE``), as the
optimiser's iterates are solved; without it the tight tolerance the final design and
every reported compliance use.

Every job runs in its own process so its peak resident memory (``ru_maxrss``) belongs
to it alone. Baselines solve the same system once: ``scipy.sparse.linalg.spsolve``
(the plain SciPy baseline), CHOLMOD (analysis + factorisation + solve) and pyamg
smoothed aggregation with rigid-body modes as CG preconditioner. Baselines predicted
to take longer than ``--baseline-limit`` seconds (from the previous size and the growth
exponent seen so far) or to need too much memory are skipped and marked so.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))


# ----------------------------------------------------------------------------- problem


def grid_shape(dims: int, n_elements: float) -> tuple[int, ...]:
    """Cantilever grid of about ``n_elements`` elements, aspect 2:1 or 2:1:1."""
    if dims == 2:
        ny = max(2, round(math.sqrt(n_elements / 2)))
        return (2 * ny, ny)
    n = max(2, round((n_elements / 2) ** (1 / 3)))
    return (2 * n, n, n)


def cantilever_problem(shape: tuple[int, ...], solver: str):
    from topopt.problem import problem_from_dict

    dims = len(shape)
    nx, ny = shape[0], shape[1]
    load_where = {"x": [float(nx), float(nx)], "y": [0.0, 0.0]}
    force = [0.0, -1.0] + ([0.0] if dims == 3 else [])
    data = {
        "name": "benchmark cantilever",
        "domain": {"shape": list(shape), "element_size": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3, "void_stiffness": 1e-9},
        "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y", "z"][:dims]}],
        "loads": [{"where": load_where, "force": force}],
        "optimize": {"volume_fraction": 0.3, "filter_radius": 1.5, "penalty": 3.0,
                     "solver": solver, "max_iterations": 2},
        "build": {"direction": "none"},
    }
    del ny
    return problem_from_dict(data, source="benchmark")


def density_field(shape: tuple[int, ...], kind: str) -> np.ndarray:
    """Design variables: a smooth truss-like field or independent random values."""
    rng = np.random.default_rng(2024)
    if kind == "random":
        return rng.random(shape)
    coords = np.meshgrid(*[(np.arange(n) + 0.5) / n for n in shape], indexing="ij")
    x, y = coords[0], coords[1]
    # Diagonal members of a truss: ridges of two families of lines across the span,
    # top and bottom chords, and a root block at the clamp. Values 0.001 to 1.
    wave = np.maximum(np.cos(2 * np.pi * (3 * x + y)), np.cos(2 * np.pi * (3 * x - y)))
    chords = np.maximum(np.exp(-((y - 0.08) / 0.07) ** 2), np.exp(-((y - 0.92) / 0.07) ** 2))
    field = np.maximum(wave - 0.6, 0.0) / 0.4
    field = np.maximum(field, chords)
    field = np.maximum(field, (x < 0.05).astype(float))
    if len(shape) == 3:
        z = coords[2]
        field *= 0.6 + 0.4 * np.cos(np.pi * (z - 0.5)) ** 2
    return np.clip(field, 1e-3, 1.0)


# --------------------------------------------------------------------------------- jobs


class Clock:
    """Wall and CPU (all threads of this process) time of consecutive stages."""

    STAGES = ("filter", "assembly", "solve", "sensitivities", "update")

    def __init__(self, into: dict):
        self.into = into
        self.wall = time.perf_counter()
        self.cpu = time.process_time()

    def lap(self, name: str) -> None:
        wall, cpu = time.perf_counter(), time.process_time()
        self.into[name] = wall - self.wall
        self.into[name + "_cpu"] = cpu - self.cpu
        self.wall, self.cpu = wall, cpu


def peak_rss_gb() -> float:
    """Peak resident memory of this process so far (Linux reports kB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2


def run_iteration_job(shape, kind, solver, iterations=2, loop=False):
    from topopt.driver import build_filter_chain
    from topopt.objective import (
        ComplianceModel,
        energy_compliances,
        simp_modulus,
        simp_modulus_derivative,
        volume_fraction,
    )
    from topopt.optimizers import oc_update

    problem = cantilever_problem(shape, solver)
    t = time.perf_counter()
    model = ComplianceModel(problem)
    chain = build_filter_chain(problem)
    setup = time.perf_counter() - t
    x = density_field(shape, kind)
    n = x.size
    unit = np.full(shape, 1.0 / n)
    rows = []
    for _ in range(iterations):
        stage = {}
        clock = Clock(stage)
        physical = chain.forward(x)
        clock.lap("filter")
        moduli = simp_modulus(physical.ravel(), penalty=3.0, void_stiffness=1e-9)
        # As ComplianceModel.displacements: a matrix-free solver is given no matrix.
        matrix_free = getattr(model.solver, "matrix_free", False)
        K = None if matrix_free else model.assembler.assemble(moduli)
        clock.lap("assembly")
        F = model.forces[model.free]
        Uf = model.solver.solve(K, F, moduli=moduli, loop=loop).reshape(model.free.size, -1)
        clock.lap("solve")
        U = np.zeros_like(model.forces)
        U[model.free] = Uf
        del K
        case_energy = model.element_energy(U)
        # the optimiser's compliance (ComplianceModel.evaluate), not f.u alone
        compliance = float(energy_compliances(model.forces, U, moduli, case_energy).sum())
        energy = case_energy.sum(axis=1)
        dE = simp_modulus_derivative(physical.ravel(), penalty=3.0, void_stiffness=1e-9)
        dc = chain.backward((-dE * energy).reshape(shape))
        dv = chain.backward(unit)
        clock.lap("sensitivities")
        x_new = oc_update(x, dc, dv, volume=volume_fraction(physical), volume_fraction=0.3,
                          move=0.2, active=np.ones(shape, dtype=bool))
        clock.lap("update")
        stage["total"] = sum(stage[k] for k in Clock.STAGES)
        stage["total_cpu"] = sum(stage[k + "_cpu"] for k in Clock.STAGES)
        stage["iterations"] = int(model.solver.iterations)
        stage["compliance"] = compliance
        rows.append(stage)
        x = x_new
    return {"setup_s": setup, "solver": model.solver.name, "n_free": int(model.free.size),
            "iterations": rows, "peak_rss_gb": peak_rss_gb(),
            "levels": getattr(getattr(model.solver, "hierarchy", None), "n_levels", None)}


def rigid_body_modes(grid, free):
    coords = grid.node_coordinates()
    coords = coords - coords.mean(axis=0)
    d = grid.dim
    modes = []
    for a in range(d):
        m = np.zeros((grid.n_nodes, d))
        m[:, a] = 1.0
        modes.append(m.ravel())
    pairs = [(0, 1)] if d == 2 else [(0, 1), (1, 2), (0, 2)]
    for a, b in pairs:
        m = np.zeros((grid.n_nodes, d))
        m[:, a] = -coords[:, b]
        m[:, b] = coords[:, a]
        modes.append(m.ravel())
    return np.column_stack(modes)[free]


def run_baseline_job(shape, kind, baseline):
    from topopt.objective import ComplianceModel, simp_modulus

    problem = cantilever_problem(shape, "scipy")
    model = ComplianceModel(problem)
    physical = model_filter(problem, density_field(shape, kind))
    moduli = simp_modulus(physical.ravel(), penalty=3.0, void_stiffness=1e-9)
    K = model.assembler.assemble(moduli)
    f = model.forces[model.free][:, 0]
    out = {"baseline": baseline}
    t = time.perf_counter()
    cpu = time.process_time()
    if baseline == "spsolve":
        from scipy.sparse.linalg import spsolve

        u = spsolve(K, f)
        out["iterations"] = 0
    elif baseline == "cholmod":
        from sksparse.cholmod import cholesky

        u = cholesky(K)(f)
        out["iterations"] = 0
    elif baseline == "pyamg":
        import pyamg

        B = rigid_body_modes(problem.grid, model.free)
        residuals = []
        ml = pyamg.smoothed_aggregation_solver(K.tocsr(), B=B)
        # Relative residual 1e-8 gives compliance to about 1e-6 on these systems.
        u = ml.solve(f, tol=1e-8, accel="cg", maxiter=2000, residuals=residuals)
        out["iterations"] = len(residuals) - 1
    else:
        raise ValueError(f"unknown baseline {baseline!r}")
    out["time_s"] = time.perf_counter() - t
    out["cpu_s"] = time.process_time() - cpu
    out["compliance"] = float(f @ u)
    out["peak_rss_gb"] = peak_rss_gb()
    return out


def run_product_job(shape, kind, repeats=15):
    """Time one CSR product y = K x of the assembled fine-grid matrix (the unit of cost).

    The matrix is the one the iteration job assembles first (same problem and field),
    held as CSR with 32-bit indices and 64-bit values. Two kernels multiply it: a
    compiled loop over the rows on all of numba's threads, and scipy's own (serial)
    CSR product; the unit is the faster of the two medians of ``repeats`` products
    after one warm-up (on this machine scipy's serial loop was sometimes the faster,
    so taking only the threaded one would make our iteration look cheaper). The
    fastest and slowest single products are reported to show the noise. The kernels
    live here, not in the solver, so that changes to the solver never change the unit.
    """
    from scipy import sparse

    from topopt.objective import ComplianceModel, simp_modulus

    problem = cantilever_problem(shape, "scipy")
    model = ComplianceModel(problem)
    physical = model_filter(problem, density_field(shape, kind))
    moduli = simp_modulus(physical.ravel(), penalty=3.0, void_stiffness=1e-9)
    K = model.assembler.assemble(moduli)
    # K is symmetric: its CSC arrays are the CSR arrays of the same matrix.
    indptr, indices, data = K.indptr, K.indices, K.data
    K_csr = sparse.csr_matrix((data, indices, indptr), shape=K.shape)
    x = np.random.default_rng(7).random(K.shape[0])
    y = np.empty_like(x)
    kernels = {
        "numba": lambda: _bench_csr_matvec(indptr, indices, data, x, y),
        "scipy": lambda: K_csr @ x,
    }
    timings = {}
    for name, kernel in kernels.items():
        kernel()
        times, cpu = [], []
        for _ in range(repeats):
            t, c = time.perf_counter(), time.process_time()
            kernel()
            times.append(time.perf_counter() - t)
            cpu.append(time.process_time() - c)
        timings[name] = (times, cpu)
    _bench_csr_matvec(indptr, indices, data, x, y)
    check = float(np.abs(y - K_csr @ x).max() / np.abs(y).max())
    best = min(timings, key=lambda name: np.median(timings[name][0]))
    times, cpu = timings[best]
    all_times = timings["numba"][0] + timings["scipy"][0]
    import numba

    return {"product_s": float(np.median(times)), "product_cpu_s": float(np.median(cpu)),
            "product_kernel": best,
            "product_numba_s": float(np.median(timings["numba"][0])),
            "product_scipy_s": float(np.median(timings["scipy"][0])),
            "product_min_s": float(min(all_times)),
            "product_max_s": float(max(all_times)), "nnz": int(K.nnz),
            "threads": int(numba.get_num_threads()), "check": check,
            "peak_rss_gb": peak_rss_gb()}


def _bench_csr_matvec(indptr, indices, data, x, y):
    global _KERNEL
    if _KERNEL is None:
        import numba

        @numba.njit(parallel=True, cache=False)
        def kernel(indptr, indices, data, x, y):  # pragma: no cover - compiled
            for i in numba.prange(indptr.size - 1):
                acc = 0.0
                for t in range(indptr[i], indptr[i + 1]):
                    acc += data[t] * x[indices[t]]
                y[i] = acc

        _KERNEL = kernel
    _KERNEL(indptr, indices, data, x, y)


_KERNEL = None


def model_filter(problem, x):
    from topopt.driver import build_filter_chain

    return build_filter_chain(problem).forward(x)


THREAD_VARIABLES = ("NUMBA_NUM_THREADS", "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS",
                    "MKL_NUM_THREADS")


def spawn(job: dict, timeout: float, threads: int | None = None) -> dict:
    """Run one job in a fresh interpreter; return its JSON result or the failure."""
    cmd = [sys.executable, str(Path(__file__).resolve()), "--job", json.dumps(job)]
    env = dict(os.environ)
    if threads:
        env.update({k: str(threads) for k in THREAD_VARIABLES})
    t = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env)
    except subprocess.TimeoutExpired:
        return {"skipped": f"killed after {timeout:.0f} s"}
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
        return {"skipped": f"failed: {tail[:200]}", "wall_s": time.perf_counter() - t}
    return json.loads(proc.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------------ machine


def machine_description() -> dict:
    from topopt.solvers import blas_info, cholmod_available, cholmod_blas

    cpu = platform.processor() or "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = "unknown"
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem = f"{int(line.split()[1]) / 1024**2:.1f} GB"
    except OSError:
        pass
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "memory": mem,
        "python": platform.python_version(),
        "numpy_blas": blas_info(),
        "cholmod": cholmod_blas() if cholmod_available() else "not installed",
        "load_average": os.getloadavg(),
    }


# -------------------------------------------------------------------------------- sweep


def predicted(previous: tuple[float, float] | None, exponent: float, n: int) -> float:
    if previous is None:
        return 0.0
    n0, t0 = previous
    return t0 * (n / n0) ** exponent


def sweep(args) -> dict:
    dims = args.dims
    sizes = [int(float(s)) for s in args.elements]
    result = {"dims": dims, "machine": machine_description(),
              "started": time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime()),
              "load_before": os.getloadavg(), "threads": args.threads,
              "loop_tolerance": bool(args.loop), "runs": []}
    # Growth of the direct baselines: about n^1.5 (2D) / n^2 (3D) for sparse direct
    # solvers on grids (nested dissection); used only to decide what to skip.
    direct_exponent = 1.5 if dims == 2 else 2.0
    last = {"spsolve": None, "cholmod": None, "pyamg": None}
    limits = {"spsolve": args.spsolve_limit, "cholmod": args.baseline_limit,
              "pyamg": args.baseline_limit}
    for n in sizes:
        shape = grid_shape(dims, n)
        for kind in args.fields:
            entry = {"shape": shape, "n_elements": int(np.prod(shape)), "field": kind,
                     "load_before": os.getloadavg()}
            # The unit of cost: one CSR product of the fine matrix, timed in its own
            # process just before and just after our iteration job (same load).
            unit = {"kind": "product", "shape": shape, "field": kind}
            entry["product_before"] = spawn(unit, args.timeout, args.threads)
            job = {"kind": "iteration", "shape": shape, "field": kind, "solver": args.solver,
                   "loop": args.loop}
            entry["ours"] = spawn(job, args.timeout, args.threads)
            entry["product_after"] = spawn(unit, args.timeout, args.threads)
            if args.direct_solver:
                job = {"kind": "iteration", "shape": shape, "field": kind,
                       "solver": args.direct_solver}
                if kind == "smooth" and not _too_big_for_direct(dims, shape, args):
                    entry["direct"] = spawn(job, args.timeout, args.threads)
                else:
                    entry["direct"] = {"skipped": "too large for a direct solve here"
                                       if kind == "smooth" else "smooth field only"}
            entry["baselines"] = {}
            for base in args.baselines:
                if kind != "smooth" and base != "pyamg":
                    continue
                exponent = 1.2 if base == "pyamg" else direct_exponent
                guess = predicted(last[base], exponent, entry["n_elements"])
                limit = limits[base]
                if guess > limit:
                    entry["baselines"][base] = {
                        "skipped": f"predicted {guess:.0f} s > {limit:.0f} s"}
                    continue
                if base == "cholmod" and _too_big_for_direct(dims, shape, args):
                    entry["baselines"][base] = {"skipped": "predicted memory too large"}
                    continue
                job = {"kind": "baseline", "shape": shape, "field": kind, "baseline": base}
                out = spawn(job, max(limit * 3, 60), args.threads)
                entry["baselines"][base] = out
                if "time_s" in out and kind == "smooth":
                    last[base] = (entry["n_elements"], out["time_s"])
                elif "time_s" not in out:
                    last[base] = (entry["n_elements"], float("inf"))
            entry["load_after"] = os.getloadavg()
            result["runs"].append(entry)
            print(_one_line(entry), flush=True)
            _write_json(args.out, result)
    result["load_after"] = os.getloadavg()
    result["growth_exponent"] = growth_exponents(result)
    _write_json(args.out, result)
    return result


def _too_big_for_direct(dims, shape, args) -> bool:
    n = int(np.prod(shape))
    return n > (args.direct_max_2d if dims == 2 else args.direct_max_3d)


def growth_exponents(result) -> dict:
    """Slope of log(time per iteration) against log(elements), per field and solver."""
    out = {}
    for kind in ("smooth", "random"):
        for who in ("ours", "direct"):
            for key, label in (("total", "wall"), ("total_cpu", "CPU")):
                pts = [(r["n_elements"], r[who]["iterations"][-1][key])
                       for r in result["runs"]
                       if r["field"] == kind and who in r and "iterations" in r[who]]
                if len(pts) >= 2:
                    n, t = np.array(pts).T
                    out[f"{who}/{kind}/{label}"] = float(
                        np.polyfit(np.log(n), np.log(t), 1)[0])
    return out


def product_unit(entry, key: str = "product_s") -> float | None:
    """Seconds of one fine-grid CSR product: mean of the timings before and after
    (``key="product_cpu_s"``: CPU seconds of all threads)."""
    times = [entry.get(k, {}).get(key) for k in ("product_before", "product_after")]
    times = [t for t in times if t]
    return float(np.mean(times)) if times else None


def _one_line(entry) -> str:
    ours = entry["ours"]
    if "iterations" in ours:
        it = ours["iterations"][-1]
        main = (f"{it['total']:.2f} s/it (solve {it['solve']:.2f} s, {it['iterations']} its), "
                f"{ours['peak_rss_gb']:.2f} GB")
        unit = product_unit(entry)
        if unit:
            main += (f", product {unit * 1e3:.1f} ms: {it['total'] / unit:.0f} products/it "
                     f"(solve {it['solve'] / unit:.0f})")
    else:
        main = ours.get("skipped", "?")
    base = ", ".join(f"{k}: {v.get('time_s', v.get('skipped'))}" for k, v in
                     entry["baselines"].items())
    return f"{entry['shape']} {entry['field']}: {main}; {base}"


def _write_json(path, data):
    path = Path(path)
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(json.dumps(data, indent=1))
    os.replace(tmp, path)


# ----------------------------------------------------------------------------- markdown


def _fmt(value, digits=2):
    if value is None:
        return "—"
    return f"{value:.{digits}f}"


def markdown(results: list[dict]) -> str:
    lines = ["# Benchmarks: one optimisation iteration", ""]
    lines.append("Tables written by `benchmarks/iteration.py --report`. Cantilever, "
                 "filter radius 1.5 elements, penalty 3, void stiffness 1e-9; times in "
                 "seconds, memory = peak resident set of the process. `ours` is the second "
                 "of two iterations with the same model (steady state: warm start); the "
                 "first iteration's total is in brackets. Baselines solve the same system "
                 "once (smooth field; pyamg also on the random one).")
    lines.append("")
    m = results[0]["machine"]
    lines.append(f"Machine: {m['cpu']}, {m['cores']} cores, {m['memory']} memory, Python "
                 f"{m['python']}, NumPy BLAS: {m['numpy_blas']}, CHOLMOD linked to: "
                 f"{m['cholmod']}.")
    lines.append("")
    for res in results:
        d = res["dims"]
        threads = res.get("threads") or "default"
        after = res.get("load_after")
        solve = ("design-loop tolerance" if res.get("loop_tolerance")
                 else "final tolerance")
        load = f"1-min load average before {res['load_before'][0]:.1f}"
        if after:
            load += f", after {after[0]:.1f}"
        lines.append(f"## {d}D (run started {res['started']}, threads per job: {threads}, "
                     f"solve to the {solve}, {load})")
        lines.append("")
        lines.append("| elements | dofs | field | solver | filter | assembly | solve (its) | "
                     "sensitivities | update | total s/it [first] | CPU s/it | peak GB | "
                     "CHOLMOD s/it | CHOLMOD solve | pyamg SA+CG (its) | spsolve | "
                     "pyamg/ours solve, wall (CPU) | spsolve/ours solve, wall (CPU) | load |")
        lines.append("|" + "---|" * 19)
        for r in res["runs"]:
            o = r["ours"]
            if "iterations" not in o:
                lines.append(f"| {r['n_elements']:,} | | {r['field']} | {o.get('skipped')} |"
                             + " |" * 15)
                continue
            it = o["iterations"][-1]
            first = o["iterations"][0]["total"]
            b = r["baselines"]

            def base(name, b=b):
                v = b.get(name)
                if v is None:
                    return "not run", None
                if "time_s" not in v:
                    return f"skipped ({v.get('skipped')})", None
                extra = f" ({v['iterations']})" if name == "pyamg" else ""
                return f"{v['time_s']:.2f}{extra}", v["time_s"]

            chol, _ = base("cholmod")
            amg, amg_t = base("pyamg")
            sps, sps_t = base("spsolve")

            def ratio(name, b=b, it=it):
                v = b.get(name, {})
                if "time_s" not in v:
                    return "—"
                return (f"{v['time_s'] / it['solve']:.1f} "
                        f"({v['cpu_s'] / it['solve_cpu']:.1f})")

            direct = r.get("direct", {})
            if "iterations" in direct:
                d_it = direct["iterations"][-1]
                direct_s = f"{_fmt(d_it['total'])} ({_fmt(d_it['total_cpu'])} CPU)"
            else:
                direct_s = direct.get("skipped", "not run") if direct else "not run"
            ratio_amg, ratio_sps = ratio("pyamg"), ratio("spsolve")
            load = f"{r['load_before'][0]:.1f}/{r['load_after'][0]:.1f}"
            lines.append(
                f"| {r['n_elements']:,} | {o['n_free']:,} | {r['field']} | {o['solver']} | "
                f"{_fmt(it['filter'])} | {_fmt(it['assembly'])} | "
                f"{_fmt(it['solve'])} ({it['iterations']}) | {_fmt(it['sensitivities'])} | "
                f"{_fmt(it['update'])} | {_fmt(it['total'])} [{_fmt(first)}] | "
                f"{_fmt(it.get('total_cpu'))} | "
                f"{_fmt(o['peak_rss_gb'])} | {direct_s} | {chol} | {amg} | {sps} | "
                f"{ratio_amg} | {ratio_sps} | {load} |")
        lines.append("")
        lines.extend(_product_table(res))
        for r in res["runs"]:
            if r.get("note"):
                lines.append(f"Row {r['n_elements']:,} ({r['field']}): {r['note']}.")
                lines.append("")
        ge = res.get("growth_exponent", {})
        if ge:
            lines.append("Growth exponent of the time per iteration (least-squares slope of "
                         "log time against log elements): "
                         + ", ".join(f"{k} {v:.2f}" for k, v in ge.items()) + ".")
            lines.append("")
        checks = []
        for r in res["runs"]:
            o, b = r["ours"], r["baselines"].get("cholmod", {})
            if "iterations" in o and "compliance" in b:
                c, ref = o["iterations"][0]["compliance"], b["compliance"]
                checks.append(f"{r['n_elements']:,} ({r['field']}): {abs(c - ref) / ref:.1e}")
        if checks:
            lines.append("Relative compliance difference, first iteration of `ours` vs "
                         "CHOLMOD on the same system: " + "; ".join(checks) + ".")
            lines.append("")
    lines.append("`CHOLMOD s/it` is the same iteration with the direct solver (analysis "
                 "reused); `CHOLMOD solve` is analysis + factorisation + solve once. "
                 "Times are wall-clock seconds unless marked CPU. Ratios compare wall solve "
                 "times in the same run (pyamg: set-up + solve; spsolve: one call). `load` "
                 "is the 1-minute load average before/after the size was run; when it is "
                 "above the number of cores the machine was shared with other jobs and wall "
                 "times are inflated; CPU s/it (all threads of the job) is then the better "
                 "guide to what a quiet machine would show.")
    return "\n".join(lines) + "\n"


def _product_table(res) -> list[str]:
    """Each stage of `ours` as a multiple of one fine-grid CSR product of the same run."""
    rows = [r for r in res["runs"] if product_unit(r) and "iterations" in r["ours"]]
    if not rows:
        return []
    newer = any("product_kernel" in r.get("product_before", {}) for r in rows)
    kernel = ("the faster of a compiled row loop on the job's threads and scipy's serial "
              "CSR product (kernel named after the times)" if newer else
              "compiled row loop on the job's threads")
    lines = ["The same iterations in units of one CSR product y = K x of the assembled "
             f"fine-grid matrix (64-bit values, 32-bit indices, {kernel}), timed in its own "
             "process just before and just after the "
             "iteration job; the unit is the mean of the two medians of 15 products, and "
             "the spread is the fastest and slowest single product seen. `CPU products/it` "
             "divides the iteration's CPU time (all threads) by the product's median CPU "
             "time: on a shared machine it is less disturbed by waiting for a core.", "",
             "| elements | field | nnz | product ms (before / after; spread) | filter | "
             "assembly | solve | sensitivities | update | total products/it [first] | "
             "CPU products/it | CG its | solve products per CG it | "
             "peak GB (ours / product job) |",
             "|" + "---|" * 14]
    for r in rows:
        unit = product_unit(r)
        it, first = r["ours"]["iterations"][-1], r["ours"]["iterations"][0]
        pb, pa = r.get("product_before", {}), r.get("product_after", {})
        spread = [p[k] for p in (pb, pa) for k in ("product_min_s", "product_max_s") if k in p]
        timing = " / ".join(f"{p['product_s'] * 1e3:.1f}" if "product_s" in p else "—"
                            for p in (pb, pa))
        timing += f"; {min(spread) * 1e3:.1f}-{max(spread) * 1e3:.1f}" if spread else ""
        kernels = sorted({p["product_kernel"] for p in (pb, pa) if "product_kernel" in p})
        timing += f" ({', '.join(kernels)})" if kernels else ""
        stages = " | ".join(f"{it[k] / unit:.1f}" for k in Clock.STAGES)
        per_cg = f"{it['solve'] / unit / it['iterations']:.1f}" if it["iterations"] else "—"
        nnz = pb.get("nnz") or pa.get("nnz") or 0
        peak_p = max(p.get("peak_rss_gb", 0.0) for p in (pb, pa))
        cpu_unit = product_unit(r, "product_cpu_s")
        cpu_ratio = (f"{it['total_cpu'] / cpu_unit:.0f}"
                     if cpu_unit and it.get("total_cpu") else "—")
        lines.append(f"| {r['n_elements']:,} | {r['field']} | {nnz:,} | {timing} | {stages} | "
                     f"{it['total'] / unit:.0f} [{first['total'] / unit:.0f}] | {cpu_ratio} | "
                     f"{it['iterations']} | {per_cg} | {r['ours']['peak_rss_gb']:.2f} / "
                     f"{peak_p:.2f} |")
    lines.append("")
    return lines


# ---------------------------------------------------------------------------------- CLI


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dims", type=int, choices=(2, 3), default=3)
    parser.add_argument("--elements", nargs="+", default=None,
                        help="approximate element counts (default: issue sizes)")
    parser.add_argument("--out", default=None, help="JSON file for the results")
    parser.add_argument("--fields", nargs="+", default=["smooth", "random"],
                        choices=["smooth", "random"])
    parser.add_argument("--solver", default="multigrid", help="solver of our iteration")
    parser.add_argument("--loop", action="store_true",
                        help="solve to the design loop's tolerance (as the optimiser's "
                             "iterates), not the final one")
    parser.add_argument("--direct-solver", default="cholmod",
                        help="also time full iterations with this solver ('' to skip)")
    parser.add_argument("--direct-max-2d", type=float, default=4.1e5)
    parser.add_argument("--direct-max-3d", type=float, default=7e4)
    parser.add_argument("--baselines", nargs="*", default=["spsolve", "cholmod", "pyamg"])
    parser.add_argument("--spsolve-limit", type=float, default=60.0,
                        help="skip spsolve where it is predicted to take longer (s)")
    parser.add_argument("--baseline-limit", type=float, default=600.0,
                        help="skip CHOLMOD / pyamg where predicted to take longer (s)")
    parser.add_argument("--timeout", type=float, default=1800.0)
    parser.add_argument("--threads", type=int, default=None,
                        help="threads for numba and BLAS in every job (default: their own)")
    parser.add_argument("--markdown", default=None, help="write the Markdown table here")
    parser.add_argument("--report", nargs="+", default=None,
                        help="only render existing JSON results to --markdown")
    parser.add_argument("--notes", default=None,
                        help="with --report: append this Markdown file (measured remarks)")
    parser.add_argument("--job", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.job is not None:
        job = json.loads(args.job)
        shape = tuple(job["shape"])
        if job["kind"] == "iteration":
            out = run_iteration_job(shape, job["field"], job["solver"],
                                    loop=bool(job.get("loop", False)))
        elif job["kind"] == "product":
            out = run_product_job(shape, job["field"])
        else:
            out = run_baseline_job(shape, job["field"], job["baseline"])
        print(json.dumps(out))
        return 0
    if args.report is not None:
        results = [json.loads(Path(p).read_text()) for p in args.report]
        text = markdown(results)
        if args.notes:
            text += "\n" + Path(args.notes).read_text()
        if args.markdown:
            Path(args.markdown).write_text(text)
        else:
            print(text)
        return 0
    if args.elements is None:
        args.elements = (["1e4", "3e4", "1e5", "2e5", "4e5"] if args.dims == 2
                         else ["1e4", "3e4", "6e4", "1e5"])
    if args.out is None:
        parser.error("--out is required for a benchmark run")
    result = sweep(args)
    if args.markdown:
        Path(args.markdown).write_text(markdown([result]))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

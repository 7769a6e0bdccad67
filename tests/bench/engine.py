"""Engine benchmark: cost of one exact update against a minimal Sherman–Morrison step.

Not a test: run ``python tests/bench/engine.py``. Figures are ratios measured in
one run (interleaved repeats, best of each) because the machines are shared.
Prints one JSON line per dimension (d = 8 with the targets), one for the drift
monitor, one for the update while another thread holds the interpreter
(``gil``), one per dimension for the blocked update with per-row steps
(``update_block``, against single updates of the same rows), and one per
dimension for the read-time solve (``solution_us``), and for d = 8 and 64 a
group commit's engine work for one model (``group``: block update and read).
"""

from __future__ import annotations

import json
import os
import sys
import time

import numpy as np

from leastwise.engine import Spec, State


def best_time(fn, number: int, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn(number)
        best = min(best, time.perf_counter() - start)
    return best / number


def measure(d: int, block_rows: int, repeat: int = 7) -> dict:
    rng = np.random.default_rng(d)
    pool = 4096
    X = rng.normal(size=(pool, d))
    Y = X @ rng.normal(size=d) + rng.normal(size=pool)

    state = State(Spec(dim=d, forgetting=0.999))
    state.update_many(X[: 4 * d], Y[: 4 * d])

    def run_update(number: int) -> None:
        upd = state.update
        for i in range(number):
            j = i & (pool - 1)
            upd(X[j], Y[j])

    # Minimal textbook recursive least squares (Sherman–Morrison on P), same d, same rows.
    P = np.eye(d) * 1e3
    w = np.zeros(d)
    lam = 0.999

    def run_sm(number: int) -> None:
        nonlocal P, w
        for i in range(number):
            j = i & (pool - 1)
            x = X[j]
            Px = P @ x
            k = Px / (lam + x @ Px)
            w = w + k * (Y[j] - x @ w)
            P = (P - np.outer(k, Px)) / lam

    number = 4000 if d <= 32 else 1000
    upd, sm = float("inf"), float("inf")
    for _ in range(repeat):  # interleave so both see the same machine load
        upd = min(upd, best_time(run_update, number, 1))
        sm = min(sm, best_time(run_sm, number, 1))

    Xb = rng.normal(size=(block_rows, d))
    yb = Xb @ rng.normal(size=d) + rng.normal(size=block_rows)
    block, lstsq = float("inf"), float("inf")
    for _ in range(3):
        s = State(Spec(dim=d))
        start = time.perf_counter()
        s.absorb_block(Xb, yb)
        s.coefficients()
        block = min(block, time.perf_counter() - start)
        start = time.perf_counter()
        np.linalg.lstsq(Xb, yb, rcond=None)
        lstsq = min(lstsq, time.perf_counter() - start)
    return {
        "d": d,
        "update_us": round(upd * 1e6, 3),
        "sm_update_us": round(sm * 1e6, 3),
        "update_ratio": round(upd / sm, 3),
        "block_rows": block_rows,
        "block_rows_per_s": round(block_rows / block),
        "block_vs_lstsq": round(block / lstsq, 3),
    }


def measure_drift(d: int = 8, repeat: int = 7) -> dict:
    """Drift cost per observation (the service's monitor hook on precomputed engine steps) over the update cost."""
    from leastwise.models import ModelConfig
    from leastwise.models.drift import ResidualMonitor

    rng = np.random.default_rng(100 + d)
    pool = 4096
    X = rng.normal(size=(pool, d))
    Y = X @ rng.normal(size=d) + rng.normal(size=pool)
    config = ModelConfig.parse({"features": [f"f{j}" for j in range(d)], "intercept": False, "forgetting": 0.999})
    state = State(config.spec())
    state.update_many(X[: 4 * d], Y[: 4 * d])
    steps = [state.update(X[i], Y[i]) for i in range(pool)]
    monitor = ResidualMonitor.for_model(config)
    number = 4000

    def run_update(count: int) -> None:
        upd = state.update
        for i in range(count):
            j = i & (pool - 1)
            upd(X[j], Y[j])

    seq = [0]

    def run_drift(count: int) -> None:
        obs = monitor.observe
        s = seq[0]
        for i in range(count):
            s += 1
            obs(steps[i & (pool - 1)], s, state)
        seq[0] = s

    upd, drift = float("inf"), float("inf")
    for _ in range(repeat):  # interleaved, same machine load
        upd = min(upd, best_time(run_update, number, 1))
        drift = min(drift, best_time(run_drift, number, 1))
    return {"d": d, "drift_us": round(drift * 1e6, 3), "update_us": round(upd * 1e6, 3),
            "drift_ratio": round(drift / upd, 3), "targets": {"drift_ratio": "<= 0.3"}}


def measure_update_block(d: int, rows: int = 64, repeat: int = 7) -> dict:
    """Per-row cost of ``State.update_block`` on runs of ``rows`` (a batch POST) over single updates, same rows."""
    rng = np.random.default_rng(200 + d)
    pool = 4096
    X = rng.normal(size=(pool, d))
    Y = X @ rng.normal(size=d) + rng.normal(size=pool)
    state = State(Spec(dim=d, forgetting=0.999))
    state.update_many(X[:1000], Y[:1000])  # past the warm-up: runs take the block path
    runs = [(X[i:i + rows], Y[i:i + rows]) for i in range(1000, pool - rows, rows)]

    def run_block(count: int) -> None:
        for k in range(count):
            state.update_block(*runs[k % len(runs)])

    def run_single(count: int) -> None:
        upd = state.update
        for k in range(count):
            xb, yb = runs[k % len(runs)]
            for i in range(rows):
                upd(xb[i], yb[i])

    number = 40 if d <= 32 else 10
    block, single = float("inf"), float("inf")
    for _ in range(repeat):  # interleaved, same machine load
        block = min(block, best_time(run_block, number, 1))
        single = min(single, best_time(run_single, number, 1))
    return {"d": d, "bench": "update_block", "rows": rows, "block_us_per_row": round(block / rows * 1e6, 3),
            "single_us_per_row": round(single / rows * 1e6, 3), "block_vs_single": round(block / single, 3)}


def measure_solution(d: int, repeat: int = 9) -> dict:
    """Cost of one read-time solve ``State.solution()`` (coefficients, rcond, refinement, sigma).

    ``solution_us``: a state read again with its cached Solution dropped (what a fresh
    read of an unchanged state costs). ``solution_after_update_us``: the first read of
    a copy that took one more observation (the service's pattern: copy, update, read).
    Best of interleaved repeats, like the figures above.
    """
    rng = np.random.default_rng(200 + d)
    n = 4 * d + 13  # a partly filled Gram buffer (13 rows pending)
    X = rng.normal(size=(n + 1, d))
    Y = X @ rng.normal(size=d) + rng.normal(size=n + 1)
    state = State(Spec(dim=d, forgetting=0.999))
    state.update_many(X[:n], Y[:n])
    state.solution()
    number = 2000 if d <= 32 else 100

    def run_fresh(count: int) -> None:
        for _ in range(count):
            state._solution = None
            state.solution()

    def updated_copies() -> list:
        out = []
        for _ in range(number):
            c = state.copy()
            c.update(X[n], float(Y[n]))
            out.append(c)
        return out

    fresh, after = float("inf"), float("inf")
    for _ in range(repeat):
        fresh = min(fresh, best_time(run_fresh, number, 1))
        copies = updated_copies()
        start = time.perf_counter()
        for c in copies:
            c.solution()
        after = min(after, (time.perf_counter() - start) / number)
    return {"d": d, "solution_us": round(fresh * 1e6, 2), "solution_after_update_us": round(after * 1e6, 2),
            "refined": bool(state.solution().refined)}


def measure_contention(d: int = 8, updates: int = 3000) -> dict:
    """State.update while another thread keeps the interpreter busy (as the event loop does for the writer).

    Every C call that lets go of the interpreter lock costs the calling thread a
    wait for the busy thread to give it back. ``update_busy_ratio`` is the update's
    time with the busy thread over its time alone; ``np_dot_busy_us`` shows what one
    such call (numpy's ``dot`` on two vectors, which the update no longer uses) costs.
    """
    import threading

    rng = np.random.default_rng(4)
    X, y = rng.standard_normal((2 * updates + 200, d)), rng.standard_normal(2 * updates + 200)
    state = State(Spec(dim=d))
    for i in range(200):
        state.update(X[i], float(y[i]))
    u, v = rng.standard_normal(d), rng.standard_normal(d)

    def timed(fn, n: int) -> float:
        start = time.perf_counter()
        for i in range(n):
            fn(i)
        return (time.perf_counter() - start) / n

    def update(i: int) -> None:
        state.update(X[200 + i % (2 * updates)], float(y[200 + i % (2 * updates)]))

    alone = timed(update, updates)
    dot_alone = timed(lambda _i: np.dot(u, v), updates)
    stop = threading.Event()

    def busy() -> None:
        while not stop.is_set():
            sum(range(100))

    worker = threading.Thread(target=busy)
    worker.start()
    try:
        contended = timed(update, updates)
        dot_contended = timed(lambda _i: np.dot(u, v), updates)
    finally:
        stop.set()
        worker.join()
    return {"d": d, "bench": "gil", "update_alone_us": round(alone * 1e6, 2), "update_busy_us": round(contended * 1e6, 2),
            "update_busy_ratio": round(contended / alone, 2), "np_dot_alone_us": round(dot_alone * 1e6, 2),
            "np_dot_busy_us": round(dot_contended * 1e6, 2)}


def measure_group(d: int, rows: int = 14, groups: int = 200) -> dict:
    """A group commit's engine work for one model: copy, ``update_block`` of ``rows`` rows, ``solution()``.

    The service's pattern at 16 connections (about 14 single posts to one model a
    group): the block update folds the 32-row Gram buffer every few groups and the
    read forms the extended Gram sums of the rows buffered since. Mean over
    ``groups`` consecutive groups (the fold recurs at fixed row counts), after 20 warm-up groups.
    """
    rng = np.random.default_rng(300 + d)
    total = (groups + 20) * rows
    X, Y = rng.normal(size=(total + 4 * d, d)), rng.normal(size=total + 4 * d)
    state = State(Spec(dim=d))
    state.update_many(X[:4 * d], Y[:4 * d])
    i = 4 * d
    update = read = 0.0
    for g in range(groups + 20):
        c = state.copy()
        t0 = time.perf_counter()
        c.update_block(X[i:i + rows], Y[i:i + rows])
        t1 = time.perf_counter()
        c.solution()
        t2 = time.perf_counter()
        if g >= 20:
            update, read = update + (t1 - t0), read + (t2 - t1)
        state, i = c, i + rows
    return {"d": d, "bench": "group", "rows": rows, "update_block_us": round(update / groups * 1e6, 1),
            "solution_us": round(read / groups * 1e6, 1)}


def main() -> None:
    quick = "--quick" in sys.argv
    rows = 100_000 if quick else 1_000_000
    info = {"cores": os.cpu_count(), "numpy": np.__version__}
    for d in (32, 128):
        print(json.dumps(measure(d, rows // (4 if d == 128 else 1)) | info))
    result = measure(8, rows) | info
    result["targets"] = {"update_ratio": "<= 1.5", "block_rows_per_s": ">= 5e6", "block_vs_lstsq": "<= 1.0"}
    print(json.dumps(result))
    print(json.dumps(measure_drift(8) | info))
    print(json.dumps(measure_contention(8) | info))
    for d in (8, 64):
        print(json.dumps(measure_update_block(d) | info))
    for d in (8, 32, 64, 128):
        print(json.dumps(measure_solution(d, 5 if quick else 9) | info))
    for d in (8, 64):
        print(json.dumps(measure_group(d) | info))


if __name__ == "__main__":
    main()

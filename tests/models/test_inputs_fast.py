"""parse_observations: the fast path gives exactly what the detailed (value-by-value) path gives.

``_parse_detailed`` is the original validation code; ``parse_observations`` tries
``_fast_observations`` first and falls back to it.  For every input both must agree:
the same observations (x bit for bit), or the same exception with the same message
and the same JSON pointers.
"""

from __future__ import annotations

import copy
import math
import random

import numpy as np
import orjson
import pytest

from leastwise.models import ModelConfig
from leastwise.models.errors import InvalidInput
from leastwise.models.inputs import (
    MAX_KEY, Observation, _fast_observations, _parse_detailed, parse_observations,
)

FEATS = ["a", "b", "c"]
CFG = ModelConfig.parse({"features": FEATS})
CFG_NO_ICPT = ModelConfig.parse({"features": FEATS, "intercept": False})
MAX_BATCH = 50


def _outcome(fn, body, config, max_batch=MAX_BATCH):
    """What a parser does with ``body``: ("ok", values) or ("error", type, detail, [(pointer, reason)])."""
    try:
        obs, batch = fn(copy.deepcopy(body), config, max_batch)
    except InvalidInput as exc:
        return ("error", "InvalidInput", exc.detail, [(e.pointer, e.reason) for e in exc.errors])
    except Exception as exc:  # noqa: BLE001 - whatever the detailed path raises, the fast path must too
        return ("error", type(exc).__name__, str(exc), [])
    rows = []
    for o in obs:
        assert isinstance(o, Observation)
        assert type(o.x) is np.ndarray and o.x.dtype == np.float64 and o.x.shape == (config.dim,)
        assert not o.x.flags.writeable
        rows.append((o.x.tobytes(), type(o.y), o.y, o.t if o.t is None else (type(o.t), o.t), o.key))
    return ("ok", batch, rows)


def _same(body, config=CFG, max_batch=MAX_BATCH):
    fast = _outcome(parse_observations, body, config, max_batch)
    detailed = _outcome(_parse_detailed, body, config, max_batch)
    assert fast == detailed
    return fast


def _good(i=0, **extra):
    return {"x": [1.5 + i, -2.0, 0.25], "y": 3.0 - i, **extra}


GOOD_BODIES = [
    _good(),
    {"x": {"c": 0.25, "a": 1.5, "b": -2.0}, "y": 1.0},
    {"x": [1, 2, 3], "y": 4},  # ints
    {"x": [1, 2.5, -0], "y": -0.0, "time": 1714521600},
    {"x": [0.0, 0.0, 0.0], "y": 0.0, "time": "2024-05-01T12:00:00Z", "key": "k"},
    {"x": [0.1, 0.2, 0.3], "y": 0.4, "time": "2024-05-01T12:00:00.250+02:00", "key": "x" * MAX_KEY},
    {"x": [0.1, 0.2, 0.3], "y": 0.4, "time": None, "key": None},
    {"x": [18446744073709551615, -9223372036854775808, 1e99], "y": 1e100},
    {"x": [1e-320, 5e-324, -1e-310], "y": 1e-300},
    {"observations": [_good(i) for i in range(MAX_BATCH)]},
    {"observations": [_good(0, key="a"), _good(1, time=1.5e9), {"x": {"a": 1, "b": 2, "c": 3}, "y": 1}]},
    {"observations": [_good(0, time="2024-05-01T12:00:00Z"), _good(1, time=1714561200.5)]},
]


@pytest.mark.parametrize("body", GOOD_BODIES)
@pytest.mark.parametrize("config", [CFG, CFG_NO_ICPT], ids=["intercept", "no-intercept"])
def test_good_bodies_take_the_fast_path_and_match(body, config):
    out = _same(body, config)
    assert out[0] == "ok"
    items = body["observations"] if "observations" in body else [body]
    fast = _fast_observations(copy.deepcopy(items), config)
    assert fast is not None, "a plainly valid body should not need the detailed path"
    for o, item in zip(fast, items):  # the values are float(value) of the input, intercept first
        x = item["x"]
        vals = [x[n] for n in FEATS] if isinstance(x, dict) else x
        expect = ([1.0] if config.intercept else []) + [float(v) for v in vals]
        assert o.x.tobytes() == np.array(expect, dtype=np.float64).tobytes()
        assert type(o.y) is float and o.y == float(item["y"])


def test_rows_are_float64_vectors_the_engine_takes_as_they_are():
    obs, batch = parse_observations({"observations": [_good(i) for i in range(4)]}, CFG, MAX_BATCH)
    assert batch
    for o in obs:
        assert type(o.x) is np.ndarray and o.x.dtype == np.dtype(np.float64) and o.x.ndim == 1
        assert o.x.shape[0] == CFG.dim
        assert np.asarray(o.x, dtype="<f8").tobytes() == np.array([1.0, *o.x[1:].tolist()]).tobytes()


class _Float(float):
    pass


class _Int(int):
    pass


def _bad_bodies():
    """One body per class of bad (or unusual) input, single and inside a batch."""
    singles = {
        "bool in x": {"x": [1.0, True, 2.0], "y": 1.0},
        "false in x": {"x": [False, 1.0, 2.0], "y": 1.0},
        "string in x": {"x": [1.0, "2", 2.0], "y": 1.0},
        "null in x": {"x": [1.0, None, 2.0], "y": 1.0},
        "list in x": {"x": [1.0, [2.0], 2.0], "y": 1.0},
        "nan in x": {"x": [1.0, math.nan, 2.0], "y": 1.0},
        "inf in x": {"x": [1.0, -math.inf, 2.0], "y": 1.0},
        "value too large": {"x": [1.0, 1.0000001e100, 2.0], "y": 1.0},
        "int too large": {"x": [1.0, 10**101, 2.0], "y": 1.0},
        "int beyond float": {"x": [1.0, 10**400, 2.0], "y": 1.0},
        "norm too large": {"x": [8e99, 8e99, 0.0], "y": 1.0},
        "too few values": {"x": [1.0, 2.0], "y": 1.0},
        "too many values": {"x": [1.0, 2.0, 3.0, 4.0], "y": 1.0},
        "empty x": {"x": [], "y": 1.0},
        "x a number": {"x": 1.0, "y": 1.0},
        "x a string": {"x": "1,2,3", "y": 1.0},
        "x null": {"x": None, "y": 1.0},
        "dict missing feature": {"x": {"a": 1.0, "b": 2.0}, "y": 1.0},
        "dict unknown feature": {"x": {"a": 1.0, "b": 2.0, "c": 3.0, "d/~": 4.0}, "y": 1.0},
        "dict bool value": {"x": {"a": 1.0, "b": True, "c": 3.0}, "y": 1.0},
        "dict bad value": {"x": {"a": 1.0, "b": math.inf, "c": "3"}, "y": 1.0},
        "missing x": {"y": 1.0},
        "missing y": {"x": [1.0, 2.0, 3.0]},
        "missing both": {},
        "unknown field": {"x": [1.0, 2.0, 3.0], "y": 1.0, "weight/~x": 2.0},
        "y bool": {"x": [1.0, 2.0, 3.0], "y": False},
        "y string": {"x": [1.0, 2.0, 3.0], "y": "1"},
        "y null": {"x": [1.0, 2.0, 3.0], "y": None},
        "y nan": {"x": [1.0, 2.0, 3.0], "y": math.nan},
        "y inf": {"x": [1.0, 2.0, 3.0], "y": math.inf},
        "y too large": {"x": [1.0, 2.0, 3.0], "y": -2e100},
        "y int too large": {"x": [1.0, 2.0, 3.0], "y": 10**200},
        "y int beyond float": {"x": [1.0, 2.0, 3.0], "y": 10**400},
        "time bool": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": True},
        "time list": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": [1]},
        "time nan": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": math.nan},
        "time inf": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": math.inf},
        "time too early": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": -62135596801},
        "time too late": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": 253402300800.0},
        "time bad string": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": "yesterday"},
        "time no offset": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": "2024-05-01T12:00:00.000"},
        "time date only": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": "2024-05-01"},
        "time bad month": {"x": [1.0, 2.0, 3.0], "y": 1.0, "time": "2024-13-01T12:00:00Z"},
        "key empty": {"x": [1.0, 2.0, 3.0], "y": 1.0, "key": ""},
        "key too long": {"x": [1.0, 2.0, 3.0], "y": 1.0, "key": "k" * (MAX_KEY + 1)},
        "key number": {"x": [1.0, 2.0, 3.0], "y": 1.0, "key": 5},
        "everything wrong": {"x": [True, "a", None], "y": "y", "time": "t", "key": 1, "other": 0},
        "not an object": [1.0, 2.0, 3.0],
        "a string": "x",
        "null body": None,
        # unusual but valid: the fast path steps aside, the detailed path accepts
        "float subclass": {"x": [_Float(1.5), 2.0, 3.0], "y": _Float(1.0)},
        "int subclass": {"x": [_Int(1), 2.0, 3.0], "y": 1.0, "time": _Int(100)},
        "norm at the edge": {"x": [1e100 / math.sqrt(3.0)] * 3, "y": 1.0},
        "norm exactly 1e100": {"x": [1e100, 0.0, -0.0], "y": 1.0},
    }
    bodies = dict(singles)
    for name, item in singles.items():
        bodies[f"batch: {name}"] = {"observations": [_good(0), _good(1), item, _good(2)]}
    bodies.update({
        "batch: extra field": {"observations": [_good()], "extra": 1},
        "batch: not a list": {"observations": {"x": [1.0, 2.0, 3.0], "y": 1.0}},
        "batch: null": {"observations": None},
        "batch: empty": {"observations": []},
        "batch: too many": {"observations": [_good(i) for i in range(MAX_BATCH + 1)]},
        "batch: many bad": {"observations": [{"x": [True, 1.0, 1.0], "y": 1.0} for _ in range(120)][:MAX_BATCH]},
        "batch: two bad": {"observations": [_good(), {"x": [1.0], "y": 1.0}, _good(), {"y": 1.0}]},
        "batch: bad after good times": {"observations": [_good(0, time=1.0), _good(1, time="2024-05-01T12:00:00Z"),
                                                         _good(2, time="noon")]},
        "batch: big int after bad time": {"observations": [_good(0, time="noon"), {"x": [10**400, 0, 0], "y": 1}]},
    })
    return bodies


BAD = _bad_bodies()
#: refused for the batch envelope (the items are fine): parse_observations does not try the fast path
ENVELOPE = {"batch: extra field", "batch: too many"}


@pytest.mark.parametrize("name", list(BAD))
@pytest.mark.parametrize("config", [CFG, CFG_NO_ICPT], ids=["intercept", "no-intercept"])
def test_bad_input_gives_the_detailed_answer(name, config):
    body = BAD[name]
    _same(body, config)
    # none of these is plain enough for the fast path: the detailed path answers every one
    items = body.get("observations") if isinstance(body, dict) and "observations" in body else [body]
    if isinstance(items, list) and items and name not in ENVELOPE:
        assert _fast_observations(copy.deepcopy(items), config) is None


def test_bad_input_messages_are_the_documented_ones():
    """A few answers spelled out, so the comparison above is not comparing two wrong things."""
    with pytest.raises(InvalidInput) as e:
        parse_observations({"observations": [_good(), {"x": [1.0, True, 2.0], "y": 1.0}]}, CFG, MAX_BATCH)
    assert e.value.detail == "/observations/1/x/1: must be a number (booleans are not numbers)"
    with pytest.raises(InvalidInput) as e:
        parse_observations({"x": {"a": 1.0, "b": 2.0, "c": 3.0, "d/~": 4.0}, "y": 1.0}, CFG, MAX_BATCH)
    assert [(x.pointer, x.reason) for x in e.value.errors] == [("/x/d~1~0", "unknown feature")]
    with pytest.raises(InvalidInput) as e:
        parse_observations({"x": [8e99, 8e99, 0.0], "y": 1.0}, CFG, MAX_BATCH)
    assert e.value.detail == "/x: the row's Euclidean norm must be at most 1e+100"
    with pytest.raises(InvalidInput) as e:
        parse_observations({"observations": [{"x": [True, 1.0, 1.0], "y": 1.0}] * 3}, CFG, MAX_BATCH)
    assert e.value.detail.endswith("(and 2 more)")


def test_norm_boundary_agrees_with_the_detailed_check():
    """Rows whose norm straddles 1e100: accepted or refused exactly as the detailed path does."""
    rng = random.Random(3)
    hits = {"ok": 0, "error": 0}
    for _ in range(400):
        v = [rng.uniform(0.1, 1.0) for _ in FEATS]
        norm = math.sqrt(sum(c * c for c in v))
        f = 1e100 / norm * (1.0 + rng.choice([-1, 1]) * 10.0 ** rng.uniform(-17, -11))
        body = {"x": [c * f for c in v], "y": 0.0}
        hits[_same(body)[0]] += 1
    assert hits["ok"] and hits["error"]


def _mutate(rng, body):
    """A random small change to a valid batch body (a value, a type, a field)."""
    items = body["observations"]
    item = rng.choice(items)
    choice = rng.randrange(9)
    junk = rng.choice([True, False, None, "1", [], {}, math.nan, math.inf, -math.inf, 1e101, 10**120, 10**400,
                       -0.0, 0, 5e-324, 1e100, _Float(2.0), _Int(2)])
    if choice == 0:
        item["x"][rng.randrange(len(item["x"]))] = junk
    elif choice == 1:
        item["y"] = junk
    elif choice == 2:
        item["time"] = rng.choice([junk, "2024-05-01T12:00:00Z", "2024-05-01 12:00:00+01:00", "2024-05-01T12:00:00",
                                   "9999-12-31T23:59:59Z", "0001-01-01T00:00:00Z", -62135596800, 253402300799.0])
    elif choice == 3:
        item["key"] = rng.choice([junk, "", "k", "k" * MAX_KEY, "k" * (MAX_KEY + 1)])
    elif choice == 4:
        del item[rng.choice(["x", "y"])]
    elif choice == 5:
        item[rng.choice(["X", "weight", "time "])] = 1.0
    elif choice == 6:
        item["x"] = rng.choice([item["x"][:-1], item["x"] + [1.0], dict(zip(FEATS, item["x"])),
                                dict(zip(FEATS[:-1], item["x"])), {**dict(zip(FEATS, item["x"])), "z": 1.0}])
    elif choice == 7:
        items[rng.randrange(len(items))] = junk
    else:
        item["x"] = [c * 3e99 for c in item["x"]]
    return body


def test_random_mutations_agree():
    rng = random.Random(11)
    kinds = {}
    for _ in range(3000):
        body = {"observations": [_good(i) for i in range(rng.randrange(1, 6))]}
        for _ in range(rng.randrange(1, 4)):
            try:
                body = _mutate(rng, body)
            except (TypeError, KeyError, IndexError, AttributeError, ValueError, OverflowError):
                pass  # the mutation did not fit what earlier ones left (e.g. x no longer a list)
        out = _same(body, rng.choice([CFG, CFG_NO_ICPT]))
        kinds[out[0]] = kinds.get(out[0], 0) + 1
        if len(body["observations"]) == 1 and rng.random() < 0.5:  # the single-observation form too
            _same(body["observations"][0])
    assert kinds.get("ok", 0) > 100 and kinds.get("error", 0) > 1000


def test_orjson_bodies_agree():
    """Bodies as the API gives them (orjson), including big integers orjson keeps as int."""
    text = (b'{"observations": [{"x": [1, 2.5, 18446744073709551615], "y": -9223372036854775808},'
            b' {"x": {"a": 1e100, "b": 0, "c": -0.0}, "y": 1e-300, "time": "2024-05-01T12:00:00Z", "key": "k"}]}')
    body = orjson.loads(text)
    assert _same(body, CFG_NO_ICPT)[0] == "ok"  # a norm of exactly 1e100 is allowed (detailed path)
    assert _fast_observations(body["observations"], CFG_NO_ICPT) is None
    assert _same(body, CFG)[0] == "ok"  # the intercept's 1 is lost in the rounding of 1e200
    assert _same(orjson.loads(text.replace(b'"b": 0', b'"b": 1e93')), CFG)[0] == "error"
    body = orjson.loads(text.replace(b"1e100", b"1e99"))
    assert _same(body, CFG_NO_ICPT)[0] == "ok"
    assert _fast_observations(body["observations"], CFG_NO_ICPT) is not None

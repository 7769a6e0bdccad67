"""Operator commands of ``leastwise``: they talk to a running service through :mod:`leastwise_client`.

Every command takes ``--url`` (``LEASTWISE_URL``), ``--token``
(``LEASTWISE_TOKEN``), ``--output table|json`` (``LEASTWISE_OUTPUT``) and
``--timeout``. Exit codes (see :data:`EXIT_CODES`): 0 done, 1 other failure,
2 bad input (usage, file, column, a value the service refused), 3 unknown
model or snapshot, 4 the service cannot be reached, 5 access refused.
"""

from __future__ import annotations

import csv
import functools
import hashlib
import io
import itertools
import json
import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, is_dataclass
from pathlib import Path
from typing import Any

import click

from leastwise_client import (
    DEFAULT_URL, Client, Conflict, Forbidden, InvalidInput, NotFound, PayloadTooLarge, Problem, Reading,
    Unauthorized, Unreachable,
)
from leastwise_client.errors import BadRequest

__all__ = ["COMMANDS", "EXIT_CODES", "import_keys", "file_digest"]

EXIT_OK, EXIT_FAILED, EXIT_INPUT, EXIT_UNKNOWN, EXIT_UNREACHABLE, EXIT_REFUSED = 0, 1, 2, 3, 4, 5
EXIT_CODES = """\b
Exit codes:
  0  done
  1  other failure (conflict, server error)
  2  bad input: usage, file, column, or a value the service refused
  3  unknown model or snapshot
  4  the service cannot be reached (is `leastwise serve` running? --url)
  5  access refused (--token / LEASTWISE_TOKEN)"""


class Session:
    """What every operator command gets: the client and the output format."""

    def __init__(self, url: str, token: str | None, output: str, timeout: float) -> None:
        self.url = url
        self.output = output
        self.client = Client(url, token=token or None, timeout=timeout)

    @property
    def json(self) -> bool:
        return self.output == "json"

    def emit_json(self, data: Any) -> None:
        click.echo(json.dumps(_plain(data), indent=2, sort_keys=False))

    def close(self) -> None:
        self.client.close()


def _plain(data: Any) -> Any:
    if is_dataclass(data) and not isinstance(data, type):
        raw = getattr(data, "raw", None)
        if raw:
            out = dict(raw)
            etag = getattr(data, "etag", None)
            if etag:
                out["etag"] = etag
            return out
        return {k: _plain(v) for k, v in asdict(data).items() if k != "raw"}
    if isinstance(data, dict):
        return {k: _plain(v) for k, v in data.items()}
    if isinstance(data, (list, tuple)):
        return [_plain(v) for v in data]
    return data


def _fail(code: int, message: str) -> None:
    click.echo(f"leastwise: {message}", err=True)
    raise click.exceptions.Exit(code)


def _problem_text(p: Problem) -> str:
    text = p.detail or p.title
    extra = [f"{e.pointer or '/'}: {e.reason}" for e in p.errors if f"{e.pointer}: {e.reason}" not in text]
    return text + ("" if not extra else " (" + "; ".join(extra[:5]) + ")")


def service_command(name: str, **settings: Any) -> Callable[[Callable[..., Any]], click.Command]:
    """A click command that gets a :class:`Session` first and maps client errors to exit codes."""

    def decorate(fn: Callable[..., Any]) -> click.Command:
        @functools.wraps(fn)
        def run(url: str, token: str | None, output: str, timeout: float, **kwargs: Any) -> None:
            session = Session(url, token, output, timeout)
            try:
                fn(session, **kwargs)
            except Unreachable as exc:
                _fail(EXIT_UNREACHABLE, f"cannot reach the service at {exc.url} ({exc.reason}); "
                                        "start it with `leastwise serve` or point --url / LEASTWISE_URL at it")
            except NotFound as exc:
                _fail(EXIT_UNKNOWN, f"{_problem_text(exc)} at {url} (`leastwise list` shows the models)")
            except (Unauthorized, Forbidden) as exc:
                _fail(EXIT_REFUSED, f"{_problem_text(exc)} ({exc.status}); give a token with --token or LEASTWISE_TOKEN")
            except (InvalidInput, BadRequest, PayloadTooLarge) as exc:
                _fail(EXIT_INPUT, f"the service refused the input: {_problem_text(exc)}")
            except Conflict as exc:
                _fail(EXIT_FAILED, _problem_text(exc))
            except Problem as exc:
                _fail(EXIT_FAILED, f"{exc.status} {exc.title}: {_problem_text(exc)}")
            finally:
                session.close()

        run = click.option("--timeout", type=float, default=10.0, show_default=True, metavar="SECONDS",
                           help="Seconds to wait for each answer.")(run)
        run = click.option("--output", "-o", type=click.Choice(["table", "json"]), default="table",
                           envvar="LEASTWISE_OUTPUT", show_default=True,
                           help="A readable table, or JSON for scripts. [env LEASTWISE_OUTPUT]")(run)
        run = click.option("--token", envvar="LEASTWISE_TOKEN", default=None, metavar="TOKEN",
                           help="Access token sent as 'Authorization: Bearer'. [env LEASTWISE_TOKEN]")(run)
        run = click.option("--url", envvar="LEASTWISE_URL", default=DEFAULT_URL, show_default=True,
                           help="The service's address. [env LEASTWISE_URL]")(run)
        settings.setdefault("epilog", EXIT_CODES)
        return click.command(name, **settings)(run)

    return decorate


# ---------------------------------------------------------------- formatting
def _num(v: Any, digits: int = 6) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.{digits}g}"
    return str(v)


def table(rows: Sequence[Sequence[Any]], header: Sequence[str]) -> str:
    cells = [[str(h) for h in header]] + [[_num(c) if not isinstance(c, str) else c for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _pairs(items: Sequence[tuple[str, Any]]) -> str:
    width = max(len(k) for k, _ in items)
    return "\n".join(f"{k.ljust(width)}  {v if isinstance(v, str) else _num(v)}" for k, v in items)


def _reasons(reasons: Sequence[dict[str, Any]]) -> str:
    return ", ".join(f"{r.get('statistic')} {r.get('level')}" for r in reasons) or "-"


# ---------------------------------------------------------------- parsing helpers
def _mapping(items: Sequence[str], what: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for item in items:
        name, sep, value = item.partition("=")
        if not sep or not name or not value:
            raise click.UsageError(f"{what} {item!r} must look like NAME=VALUE")
        out[name] = value
    return out


def _number(text: str, where: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise click.BadParameter(f"{text!r} is not a number", param_hint=where) from None


def _inputs(values: Sequence[str], features: Sequence[str]) -> dict[str, float]:
    """``load_kw=610 condenser_c=27.5`` or ``610 27.5`` (feature order) -> values by feature name."""
    named = [v for v in values if "=" in v]
    if named and len(named) != len(values):
        raise click.UsageError("give every input as FEATURE=VALUE, or every input as a plain number in feature order")
    if named:
        out = {}
        for item in named:
            k, _, v = item.partition("=")
            if k not in features:
                raise click.UsageError(f"the model has no feature {k!r} (features: {', '.join(features)})")
            out[k] = _number(v, k)
        missing = [f for f in features if f not in out]
        if missing:
            raise click.UsageError(f"missing values for {', '.join(missing)}")
        return out
    if len(values) != len(features):
        raise click.UsageError(f"expected {len(features)} values ({', '.join(features)}), got {len(values)}")
    return {f: _number(v, f) for f, v in zip(features, values)}


def _time_value(text: str) -> str | float:
    try:
        return float(text)
    except ValueError:
        return text.strip()


# ---------------------------------------------------------------- models
@service_command("list")
def list_command(s: Session) -> None:
    """List the models."""
    models = s.client.list_models()
    if s.json:
        return s.emit_json(models)
    if not models:
        click.echo("no models yet (create one with `leastwise create`)")
        return
    rows = [(m.name, ",".join(m.config.features), m.config.intercept, m.config.forgetting, m.config.half_life,
             m.config.ridge, m.version, m.created or "-") for m in models]
    click.echo(table(rows, ["name", "features", "intercept", "forgetting", "half_life", "ridge", "version", "created"]))


@service_command("show")
@click.argument("name")
def show_command(s: Session, name: str) -> None:
    """Show a model: configuration, counts, sigma, coefficients and drift status."""
    m = s.client.model(name)
    if s.json:
        return s.emit_json(m)
    c = m.config
    click.echo(_pairs([
        ("model", m.name), ("features", ", ".join(c.features)), ("intercept", c.intercept),
        ("forgetting", c.forgetting), ("half-life (s)", c.half_life), ("ridge", c.ridge), ("version", m.version),
        ("observations", m.n), ("effective n", m.effective_n), ("identifiable", m.identifiable), ("sigma", m.sigma),
        ("last time", m.last_time or "-"), ("drift", f"{m.drift.status} ({_reasons(m.drift.reasons)})"),
    ]))
    click.echo("")
    click.echo(table([(t, v) for t, v in m.coefficients.items()], ["term", "coefficient"]))


def _load_config_file(path: Path) -> dict[str, Any]:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise click.BadParameter(f"cannot read {path}: {exc.strerror}", param_hint="--file") from None
    try:
        if path.suffix.lower() == ".toml":
            import tomllib

            body = tomllib.loads(data.decode("utf-8"))
        else:
            body = json.loads(data)
    except (ValueError, UnicodeDecodeError) as exc:
        raise click.BadParameter(f"{path} is not valid {'TOML' if path.suffix.lower() == '.toml' else 'JSON'}: {exc}",
                                 param_hint="--file") from None
    if not isinstance(body, dict):
        raise click.BadParameter(f"{path} must hold one model configuration (a table/object)", param_hint="--file")
    return body


@service_command("create")
@click.argument("name")
@click.option("--feature", "-f", "features", multiple=True, metavar="NAME",
              help="A feature, in order (repeat; or comma-separated).")
@click.option("--intercept/--no-intercept", default=True, show_default=True, help="Add a term named 'intercept'.")
@click.option("--forgetting", type=float, default=1.0, show_default=True, help="Forgetting factor lambda in (0, 1].")
@click.option("--half-life", type=float, default=None, metavar="SECONDS", help="Time forgetting half-life.")
@click.option("--ridge", type=float, default=0.0, show_default=True, help="Ridge start delta >= 0.")
@click.option("--file", "config_file", type=click.Path(path_type=Path, dir_okay=False), default=None,
              help="Read the configuration from a JSON or TOML file (features, intercept, forgetting, half_life, ridge).")
def create_command(s: Session, name: str, features: tuple[str, ...], intercept: bool, forgetting: float,
                   half_life: float | None, ridge: float, config_file: Path | None) -> None:
    """Create model NAME (the same configuration again changes nothing)."""
    if config_file is not None:
        if features:
            raise click.UsageError("give the features with --feature or in --file, not both")
        body = _load_config_file(config_file)
    else:
        names = [f.strip() for item in features for f in item.split(",") if f.strip()]
        if not names:
            raise click.UsageError("name the features with --feature (or give --file)")
        body = {"features": names, "intercept": intercept, "forgetting": forgetting, "half_life": half_life,
                "ridge": ridge}
    info = s.client.create_model(name, body)
    if s.json:
        return s.emit_json({**info.raw, "created_now": info.is_new})
    state = "created" if info.is_new else "already exists with this configuration (unchanged)"
    click.echo(f"model {info.name} {state}: features {', '.join(info.config.features)}")


@service_command("delete")
@click.argument("name")
@click.option("--yes", is_flag=True, help="Do not ask for confirmation.")
def delete_command(s: Session, name: str, yes: bool) -> None:
    """Delete model NAME and all its history and snapshots."""
    if not yes:
        click.confirm(f"delete model {name} with all its history?", abort=True, err=True)
    s.client.delete_model(name)
    if s.json:
        return s.emit_json({"deleted": name})
    click.echo(f"model {name} deleted")


# ---------------------------------------------------------------- observations
@service_command("post")
@click.argument("name")
@click.argument("values", nargs=-1, required=True)
@click.option("--y", "y", required=True, help="The measured response.")
@click.option("--time", "when", default=None, help="RFC 3339 time or epoch seconds.")
@click.option("--key", default=None, help="Idempotency key (default: a fresh one).")
def post_command(s: Session, name: str, values: tuple[str, ...], y: str, when: str | None, key: str | None) -> None:
    """Post one reading to NAME: VALUES as FEATURE=VALUE pairs or numbers in feature order.

    \b
    leastwise post ch-1 load_kw=610 condenser_c=27.5 --y 131.4
    """
    features = s.client.model(name).config.features
    x = _inputs(values, features)
    answer = s.client.observe(name, x, _number(y, "--y"), time=_time_value(when) if when else None, key=key)
    if s.json:
        return s.emit_json(answer)
    r = answer.result
    click.echo(_pairs([("status", r.status), ("seq", r.seq), ("prior prediction", r.prediction),
                       ("residual", r.residual), ("standardised residual", r.standardized_residual),
                       ("observations", answer.n), ("sigma", answer.sigma)]))


def file_digest(path: Path) -> str:
    """The first 16 hex digits of the file's SHA-256: the stem of its rows' idempotency keys."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()[:16]


def import_keys(digest: str, rows: int, start: int = 1) -> list[str]:
    """Keys of data rows ``start..start+rows-1`` of a file (row 1 is the first row after the header)."""
    return [f"csv-{digest}:{i}" for i in range(start, start + rows)]


def _open_csv(path: Path, delimiter: str) -> tuple[io.TextIOBase, Any, list[str]]:
    try:
        f = open(path, newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise click.BadParameter(f"cannot read {path}: {exc.strerror}", param_hint="FILE") from None
    reader = csv.reader(f, delimiter=delimiter)
    header = next(reader, None)
    if not header:
        f.close()
        raise click.BadParameter(f"{path} is empty (the first line must name the columns)", param_hint="FILE")
    return f, reader, [h.strip() for h in header]


def _column_index(header: list[str], column: str, path: Path, role: str) -> int:
    if column not in header:
        _fail(EXIT_INPUT, f"column {column!r} ({role}) is not in {path.name}; its columns are: {', '.join(header)}")
    return header.index(column)


def _feature_columns(features: Sequence[str], mapping: dict[str, str], model: str) -> dict[str, str]:
    unknown = [k for k in mapping if k not in features]
    if unknown:
        _fail(EXIT_INPUT, f"model {model} has no feature {unknown[0]!r} (features: {', '.join(features)})")
    return {f: mapping.get(f, f) for f in features}


def _rows(reader: Any, header: list[str], path: Path, cols: dict[str, int], target: int | None,
          time_col: int | None) -> Iterator[tuple[int, dict[str, float], float | None, str | float | None]]:
    names = {i: n for n, i in cols.items()}
    for line, row in enumerate(reader, start=1):
        if not row or all(not c.strip() for c in row):
            continue
        def cell(i: int) -> str:
            if i >= len(row):
                _fail(EXIT_INPUT, f"{path.name} row {line}: no value in column {header[i]!r} (short row)")
            return row[i].strip()

        def value(i: int) -> float:
            text = cell(i)
            try:
                return float(text)
            except ValueError:
                _fail(EXIT_INPUT, f"{path.name} row {line}, column {header[i]!r}: {text!r} is not a number")
                raise AssertionError  # unreachable
        x = {names[i]: value(i) for i in names}
        y = value(target) if target is not None else None
        t = _time_value(cell(time_col)) if time_col is not None and cell(time_col) else None
        yield line, x, y, t


@service_command("import")
@click.argument("name")
@click.argument("file", type=click.Path(path_type=Path, dir_okay=False, exists=True))
@click.option("--target", required=True, metavar="COLUMN", help="The column holding the measured response y.")
@click.option("--column", "-c", "columns", multiple=True, metavar="FEATURE=COLUMN",
              help="Read FEATURE from COLUMN (repeat); unmapped features read the column of the same name.")
@click.option("--time-column", default=None, metavar="COLUMN", help="A column of RFC 3339 times or epoch seconds.")
@click.option("--batch-size", type=click.IntRange(1, 10_000), default=500, show_default=True,
              help="Rows per request.")
@click.option("--limit", type=click.IntRange(1), default=None, help="Import at most this many rows.")
@click.option("--delimiter", default=",", show_default=True, help="Field separator of the file.")
def import_command(s: Session, name: str, file: Path, target: str, columns: tuple[str, ...], time_column: str | None,
                   batch_size: int, limit: int | None, delimiter: str) -> None:
    """Import the rows of a CSV FILE (with a header line) into model NAME, in order.

    Each row is sent with the key csv-<file hash>:<row>, so running the same
    command again after an interruption skips the rows already applied.
    Every value is checked before anything is sent.

    \b
    leastwise import ch-1 readings.csv --target power_kw -c load_kw=load -c condenser_c=cond_in
    """
    features = s.client.model(name).config.features
    fmap = _feature_columns(features, _mapping(columns, "--column"), name)
    digest = file_digest(file)

    def open_rows() -> tuple[Any, Iterator[Any]]:
        f, reader, header = _open_csv(file, delimiter)
        cols = {feat: _column_index(header, col, file, f"feature {feat}") for feat, col in fmap.items()}
        tgt = _column_index(header, target, file, "--target")
        tcol = _column_index(header, time_column, file, "--time-column") if time_column else None
        return f, _rows(reader, header, file, cols, tgt, tcol)

    f, rows = open_rows()  # pass 1: check every value before sending any
    with f:
        total = sum(1 for _ in itertools.islice(rows, limit))
    applied = duplicates = 0
    f, rows = open_rows()
    with f, click.progressbar(length=total, label=f"importing {file.name} into {name}", file=sys.stderr,
                              show_pos=True) as bar:
        batch: list[Reading] = []

        def send() -> None:
            nonlocal applied, duplicates
            answer = s.client.observe_batch(name, batch)
            applied += answer.applied
            duplicates += answer.duplicates
            bar.update(len(batch))
            batch.clear()

        for count, (line, x, y, t) in enumerate(rows, start=1):
            if limit is not None and count > limit:
                break
            batch.append(Reading(x, y, t, f"csv-{digest}:{line}"))
            if len(batch) >= batch_size:
                send()
        if batch:
            send()
    state = s.client.model(name)
    summary = {"model": name, "file": str(file), "rows": total, "applied": applied, "duplicates": duplicates,
               "n": state.n, "key_prefix": f"csv-{digest}"}
    if s.json:
        return s.emit_json(summary)
    skipped = f", {duplicates} already imported (skipped)" if duplicates else ""
    click.echo(f"{total} rows: {applied} applied{skipped}; model {name} now has {state.n} observations")


# ---------------------------------------------------------------- predictions
_PRED_FIELDS = ("mean", "lower", "upper", "se_fit", "se_prediction")


@service_command("predict")
@click.argument("name")
@click.argument("values", nargs=-1)
@click.option("--level", type=float, default=None, help="Interval level in (0, 1) [service default 0.95].")
@click.option("--csv", "csv_file", type=click.Path(path_type=Path, dir_okay=False, exists=True), default=None,
              help="Predict every row of a CSV file (header line needed); writes CSV.")
@click.option("--column", "-c", "columns", multiple=True, metavar="FEATURE=COLUMN",
              help="With --csv: read FEATURE from COLUMN (default: the column of the same name).")
@click.option("--out", "out_file", type=click.Path(path_type=Path, dir_okay=False), default=None,
              help="With --csv: write here instead of standard output.")
@click.option("--delimiter", default=",", show_default=True, help="With --csv: the field separator.")
def predict_command(s: Session, name: str, values: tuple[str, ...], level: float | None, csv_file: Path | None,
                    columns: tuple[str, ...], out_file: Path | None, delimiter: str) -> None:
    """Predict NAME at VALUES (FEATURE=VALUE pairs or numbers in feature order), or at each row of --csv.

    \b
    leastwise predict ch-1 load_kw=610 condenser_c=27.5
    leastwise predict ch-1 --csv plan.csv --out plan-predicted.csv
    """
    features = s.client.model(name).config.features
    if csv_file is None:
        if columns or out_file:
            raise click.UsageError("--column and --out go with --csv")
        p = s.client.predict(name, _inputs(values, features), level=level)
        if s.json:
            return s.emit_json(p)
        click.echo(_pairs([("prediction", p.mean), (f"{p.level:.0%} interval", f"{_num(p.lower)} .. {_num(p.upper)}"),
                           ("se of the fit", p.se_fit), ("se of a reading", p.se_prediction),
                           ("approximate", p.approximate)]))
        return
    if values:
        raise click.UsageError("give VALUES or --csv, not both")
    fmap = _feature_columns(features, _mapping(columns, "--column"), name)
    f, reader, header = _open_csv(csv_file, delimiter)
    with f:
        cols = {feat: _column_index(header, col, csv_file, f"feature {feat}") for feat, col in fmap.items()}
        raw_rows = [r for r in reader if r and any(c.strip() for c in r)]
    parsed = list(_rows(iter(raw_rows), header, csv_file, cols, None, None))
    preds = []
    for i in range(0, len(parsed), 1000):
        preds += s.client.predict_rows(name, [x for _, x, _, _ in parsed[i:i + 1000]], level=level)
    out = open(out_file, "w", newline="", encoding="utf-8") if out_file else None
    try:
        writer = csv.writer(out or sys.stdout)
        writer.writerow(header + [f for f in _PRED_FIELDS if f not in header])
        extra = [f for f in _PRED_FIELDS if f not in header]
        for row, p in zip(raw_rows, preds):
            writer.writerow(row + ["" if getattr(p, f) is None else repr(getattr(p, f)) for f in extra])
    finally:
        if out is not None:
            out.close()
    if out_file:
        click.echo(f"{len(preds)} predictions written to {out_file}", err=True)


# ---------------------------------------------------------------- snapshots and reset
@service_command("snapshot")
@click.argument("name")
@click.option("--label", default=None, help="A note kept with the snapshot.")
def snapshot_command(s: Session, name: str, label: str | None) -> None:
    """Keep NAME's current state as a snapshot (restore it later with `leastwise restore`)."""
    snap = s.client.snapshot(name, label)
    if s.json:
        return s.emit_json(snap)
    click.echo(f"snapshot {snap.id} of model {name} at {snap.n} observations (version {snap.version})")


@service_command("snapshots")
@click.argument("name")
def snapshots_command(s: Session, name: str) -> None:
    """List NAME's snapshots."""
    snaps = s.client.snapshots(name)
    if s.json:
        return s.emit_json(snaps)
    if not snaps:
        click.echo(f"model {name} has no snapshots")
        return
    click.echo(table([(x.id, x.label or "-", x.n, x.version, x.created or "-") for x in snaps],
                     ["id", "label", "observations", "version", "created"]))


@service_command("restore")
@click.argument("name")
@click.argument("snapshot_id", metavar="SNAPSHOT", type=int)
def restore_command(s: Session, name: str, snapshot_id: int) -> None:
    """Make NAME's state that of SNAPSHOT (its id from `leastwise snapshots`)."""
    out = s.client.restore(name, snapshot_id)
    if s.json:
        return s.emit_json(out)
    click.echo(f"model {name} restored to snapshot {snapshot_id}: {out.n} observations (version {out.version})")


@service_command("delete-snapshot")
@click.argument("name")
@click.argument("snapshot_id", metavar="SNAPSHOT", type=int)
def delete_snapshot_command(s: Session, name: str, snapshot_id: int) -> None:
    """Remove snapshot SNAPSHOT of NAME."""
    s.client.delete_snapshot(name, snapshot_id)
    if s.json:
        return s.emit_json({"deleted_snapshot": snapshot_id, "model": name})
    click.echo(f"snapshot {snapshot_id} of model {name} removed")


@service_command("reset")
@click.argument("name")
@click.option("--yes", is_flag=True, help="Do not ask for confirmation.")
def reset_command(s: Session, name: str, yes: bool) -> None:
    """Put NAME back to its prior (no observations); the configuration stays. Snapshot first to keep the state."""
    if not yes:
        click.confirm(f"reset model {name} to no observations?", abort=True, err=True)
    out = s.client.reset(name)
    if s.json:
        return s.emit_json(out)
    click.echo(f"model {name} reset (version {out.version})")


# ---------------------------------------------------------------- drift and covariance
@service_command("drift")
@click.argument("name", required=False)
def drift_command(s: Session, name: str | None) -> None:
    """Drift status and statistics of NAME; without NAME, the status of every model."""
    if name is None:
        states = [s.client.model(m.name) for m in s.client.list_models()]
        if s.json:
            return s.emit_json([{"name": m.name, "n": m.n, **m.drift.raw} for m in states])
        if not states:
            click.echo("no models yet")
            return
        click.echo(table([(m.name, m.n, m.drift.status, _reasons(m.drift.reasons)) for m in states],
                         ["model", "observations", "drift", "reasons"]))
        return
    d = s.client.drift(name)
    if s.json:
        return s.emit_json(d)
    st, res = d.statistics, d.residuals
    click.echo(f"model {name}: drift {d.status.upper()}")
    if d.reasons:
        click.echo("")
        click.echo(table([(r.get("statistic", "?"), r.get("level", "?"), r.get("value"), r.get("threshold"),
                           r.get("since"), "yes" if r.get("latched") else "no") for r in d.reasons],
                         ["statistic", "level", "value", "threshold", "since reading", "latched"]))
    items: list[tuple[str, Any]] = []
    if res:
        items += [("standardised residuals", res.get("count")), ("last", res.get("last_standardized")),
                  ("mean", res.get("mean_standardized")), ("rms", res.get("rms_standardized")),
                  ("max |z|", res.get("max_abs_standardized"))]
    mc = st.get("mean_cusum") or {}
    if mc:
        items += [("mean CUSUM up / down", f"{_num(mc.get('up'), 4)} / {_num(mc.get('down'), 4)} "
                                           f"(watch {_num(mc.get('h_watch'))}, alarm {_num(mc.get('h_alarm'))})")]
    bias = st.get("bias") or {}
    if bias:
        items += [("bias (EWMA of z)", f"{_num(bias.get('value'), 4)} (limit {_num(bias.get('limit'), 3)})")]
    scale = st.get("scale_ratio") or {}
    if scale:
        items += [("scale ratio", f"{_num(scale.get('value'), 4)} (watch {_num(scale.get('watch'))}, "
                                  f"alarm {_num(scale.get('alarm'))})")]
    bde = st.get("bde_cusum") or {}
    if bde:
        items += [("BDE CUSUM", f"{_num(bde.get('value'), 4)} (line {_num(bde.get('line_watch'), 4)})")]
    if st.get("warming_up"):
        items += [("warming up", "yes")]
    if items:
        click.echo("")
        click.echo(_pairs(items))


@service_command("covariance")
@click.argument("name")
def covariance_command(s: Session, name: str) -> None:
    """The coefficient covariance of NAME (rows and columns by term)."""
    c = s.client.covariance(name)
    if s.json:
        return s.emit_json(c)
    if c.covariance is None:
        click.echo(f"model {name}: no coefficient covariance yet (sigma not estimable)")
        return
    click.echo(table([(t, *row) for t, row in zip(c.terms, c.covariance)], ["term", *c.terms]))


COMMANDS: list[click.Command] = [
    list_command, show_command, create_command, delete_command, post_command, import_command, predict_command,
    snapshot_command, snapshots_command, restore_command, delete_snapshot_command, reset_command, drift_command,
    covariance_command,
]

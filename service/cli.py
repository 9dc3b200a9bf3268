"""The ``dipshape`` command line.

Errors are turned into messages and exit codes by :mod:`service.errors` only; commands raise.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path
from typing import Annotated

import typer

from features.errors import DipshapeError, ParameterError
from service.errors import EXIT_FAILURE, EXIT_INTERRUPTED, cli_exit_code, cli_message

__all__ = ["app", "main"]

CAUTION = (
    "A dipshape score is triage, not a discovery: a planet or exocomet call needs follow-up "
    "(pixel-level and centroid checks, spectroscopy) before any claim."
)

app = typer.Typer(
    name="dipshape",
    help="Triage dips in stellar light curves by their shape.\n\n" + CAUTION,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode="markdown",
)


def _fail(err: DipshapeError) -> typer.Exit:
    typer.echo(cli_message(err), err=True)
    return typer.Exit(cli_exit_code(err))


@app.callback()
def _root(
    verbose: Annotated[bool, typer.Option("--verbose", "-v", help="Log progress details.")] = False,
) -> None:
    logging.basicConfig(level=logging.INFO if verbose else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s", stream=sys.stderr)


@app.command()
def simulate(
    n: Annotated[int, typer.Option("--n", min=1, help="Number of segments.")] = 1000,
    out: Annotated[Path, typer.Option("--out", help="Output folder.")] = Path("sim_out"),
    fmt: Annotated[str, typer.Option("--format", help="csv (a file per segment) or parquet "
                                     "(one long table).")] = "csv",
    seed: Annotated[int, typer.Option(
        "--seed", help="Master seed (results are reproducible).")] = 0,
    classes: Annotated[str | None, typer.Option(
        "--classes", help="Comma-separated subset of classes, e.g. planet,exocomet.")] = None,
    jobs: Annotated[int, typer.Option("--jobs", "-j", min=1, help="Parallel processes.")] = 1,
    plot: Annotated[Path | None, typer.Option(
        "--plot", help="Also write a PNG gallery of four examples per class.")] = None,
) -> None:
    """Simulate labelled segments balanced across the classes.

    Writes the segments and a labels table (labels.csv: id, label, subtype, SNR, cadence,
    n_events and every true physical parameter).

    Examples:

      dipshape simulate --n 1000 --out sim --format csv --seed 0

      dipshape simulate --n 200 --classes planet,eclipsing_binary --format parquet --out eb
    """
    from training.classes import CLASSES
    from training.simulate import simulate_dataset, write_dataset

    try:
        chosen = tuple(c.strip() for c in classes.split(",") if c.strip()) if classes else CLASSES
        segments = simulate_dataset(n, seed=seed, classes=chosen, n_jobs=jobs, progress=True)
        labels = write_dataset(segments, out, fmt=fmt)
        if plot is not None:
            from training.gallery import plot_gallery

            plot_gallery(segments, plot)
    except DipshapeError as err:
        raise _fail(err) from err
    counts = {c: sum(s.label == c for s in segments) for c in chosen}
    typer.echo(f"wrote {len(segments)} segments to {out} ({fmt}); labels: {labels}")
    typer.echo("  " + ", ".join(f"{c}: {k}" for c, k in counts.items()))


@app.command()
def demo(
    data: Annotated[Path, typer.Option("--data", help="Folder of light curves to score.")] = Path(
        "demo_data"),
    out: Annotated[Path, typer.Option("--out", help="Folder for the diagnostic PNGs.")] = Path(
        "demo_out"),
    registry: Annotated[Path | None, typer.Option(
        "--registry", help="Model registry (default: ./models, else the shipped one).")] = None,
) -> None:
    """The main job end to end: start the REST service on a free loopback port, score every
    file of --data through it with the Python client, print a table, write one diagnostic PNG
    per segment to --out, stop the service.

    The shipped demo_data/ holds invented segments of the fictional Lumen Survey; its
    labels.csv, when present, gives the class a vetter should see (column "expected").

    Example:

      dipshape demo --data demo_data --out demo_out
    """
    import csv
    import tempfile

    from rich.console import Console
    from rich.table import Table

    from features.io import read_segment
    from service.client import DipshapeClient
    from service.local import running_service
    from service.scoring import find_inputs
    from service.settings import ServiceSettings

    root = _registry_or_default(registry)
    expected: dict[str, str] = {}
    if (data / "labels.csv").is_file():
        with (data / "labels.csv").open(newline="") as fh:
            expected = {r["id"]: r["label"] for r in csv.DictReader(fh)}
    try:
        files = find_inputs([data])
    except DipshapeError as err:
        raise _fail(err) from err
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    with tempfile.TemporaryDirectory(prefix="dipshape-demo-") as tmp:
        settings = ServiceSettings(registry=root, db=Path(tmp) / "store.sqlite")
        try:
            with running_service(settings) as base_url, DipshapeClient(base_url) as client:
                version = client.active_model()["version"]
                typer.echo(f"service up at {base_url} (model {version}); scoring "
                           f"{len(files)} files", err=True)
                for path in files:
                    for result in client.score_file(path):
                        png = None
                        if "error" not in result:
                            target = out / f"{result['id']}.png"
                            target.write_bytes(client.plot(read_segment(path)))
                            png = target
                        rows.append((result, png))
        except DipshapeError as err:
            raise _fail(err) from err
    table = Table(title=f"Lumen Survey (fictional) segments scored through the REST service "
                        f"by {version}")
    for col in ("id", "label", "p", "expected", "flags"):
        table.add_column(col)
    right = failed = 0
    for result, _png in rows:
        want = expected.get(result["id"], "-")
        if "error" in result:
            failed += 1
            table.add_row(result["id"], f"error {result['error']}", "", want, result["detail"])
            continue
        label = result["label"]
        right += label == want
        mark = "" if want in ("-", label) else " (x)"
        table.add_row(result["id"], label + mark, f"{result['probabilities'][label]:.2f}",
                      want, ", ".join(result["flags"]))
    console = Console(width=max(Console().width, 120))
    console.print(table)
    if expected:
        console.print(f"{right} of {len(rows)} segments get the class a vetter should see")
    console.print(f"diagnostic plots written to {out}/")
    console.print(CAUTION)
    if failed:
        raise typer.Exit(EXIT_FAILURE)


@app.command()
def score(
    paths: Annotated[list[Path] | None, typer.Argument(
        metavar="PATH", help="Light-curve files (CSV, JSON, FITS, Parquet), folders of them, "
        "glob patterns or manifests (batch mode).", show_default=False)] = None,
    out: Annotated[str | None, typer.Option(
        "--out", "-o", metavar="FILE|DIR/",
        help="Write the JSON lines to this file (default: standard output); in batch mode the "
        "folder of the parts.", show_default=False)] = None,
    model_version: Annotated[str | None, typer.Option(
        "--model", "-m", metavar="VERSION",
        help="Model version to score with (default: the registry's active version).",
        show_default=False)] = None,
    registry: Annotated[Path | None, typer.Option(
        "--registry", metavar="DIR",
        help="Model registry folder (default: ./models when that folder exists, else the "
        "models/ folder shipped with dipshape).", show_default=False)] = None,
    ephemeris: Annotated[str | None, typer.Option(
        "--ephemeris", metavar="P,T0,DUR",
        help="Known period, mid-transit epoch and duration in days (the files' own time "
        "system), applied to every segment; no period is searched.",
        show_default=False)] = None,
    scheduler: Annotated[str | None, typer.Option(
        "--scheduler", metavar="ADDRESS", help="Batch mode on an existing Dask cluster, e.g. "
        "tcp://10.0.0.5:8786.", show_default=False)] = None,
    workers: Annotated[int | None, typer.Option(
        "--workers", min=1, metavar="N", help="Batch mode on a local Dask cluster of N worker "
        "processes (one thread each; about one per core).", show_default=False)] = None,
    chunk_size: Annotated[int | None, typer.Option(
        "--chunk-size", min=1, metavar="N", help="Batch mode: segments per chunk, i.e. per "
        "task and per part [default: 64].", show_default=False)] = None,
    fmt: Annotated[str | None, typer.Option(
        "--format", metavar="parquet|jsonl", help="Batch mode: format of the parts "
        "[default: parquet].", show_default=False)] = None,
    resume: Annotated[bool, typer.Option(
        "--resume", help="Batch mode: keep the parts already in DIR and score the missing "
        "chunks; refused when the inputs, chunking or model differ.")] = False,
    stdin: Annotated[bool, typer.Option(
        "--stdin", help="Read segment JSON lines from standard input and write result lines "
        "to standard output, in order, one flushed line each.")] = False,
    progress: Annotated[bool | None, typer.Option(
        "--progress/--no-progress", help="Progress bar on standard error [default: only on "
        "a terminal].", show_default=False)] = None,
) -> None:
    """Score light curves: one JSON object per segment, one per line.

    Each PATH is a light-curve file (.csv .tsv .txt .csv.gz, .json, .fits .fit .fts .fits.gz,
    .parquet .pq) or a folder whose light-curve files are scored in name order (not recursing;
    hidden files and labels.csv are skipped). A CSV or Parquet table with a segment_id column,
    or a JSON list, holds many segments.

    Each line is a result {schema_version, id, label, probabilities, flags, features, events,
    ephemeris, model, elapsed_ms} or, for a file or segment that cannot be scored, an error
    {schema_version, id, error, detail} (error is a stable code); the schema is
    service/result.schema.json, schema_version "1". The id is the file's name without its
    suffix, or the segment_id of a table. Lines follow the order of the inputs and, apart from
    elapsed_ms, are identical from run to run. A progress bar goes to standard error when it
    is a terminal.

    **Batch mode** applies when --scheduler, --workers, --chunk-size, --format or --resume is
    given, or when --out ends with a slash: the segments are cut into chunks, each scored as
    one task and written to DIR as one part (part-00000.parquet... or .jsonl), complete or
    not at all; DIR also gets manifest.json (inputs, chunking, model) and summary.json
    (counts by error code). A Parquet part holds the columns id, input, label, error,
    model_version and result_json (the exact line above); a JSON-lines part holds the lines.
    --scheduler runs on an existing Dask cluster (the workers need dipshape installed, not the
    client's files: the client sends each chunk's data and writes the parts); --workers N
    starts a local one; a job of a single chunk, or without either option, runs in this
    process. Batch mode also takes glob patterns and manifests (a CSV or Parquet file with a
    path column; relative paths from the manifest's folder). --resume after an interruption
    scores only the chunks without a part. In a Parquet long table a segment that cannot be
    read gets its own error record.

    **--stdin** reads {"id"?, "time", "flux", "flux_err"?} lines (null = missing point; the
    id defaults to line-N) and writes one result or error line per line; a bad line gives an
    error line and the stream goes on.

    A score is triage, not a discovery: a planet or exocomet call needs follow-up.

    Exit codes: 0 every segment scored; 1 some segment could not be scored (the others are
    still written), the model could not be loaded, or a batch chunk was left unfinished; 2 bad
    arguments (e.g. --ephemeris, or --resume with other inputs) or no light-curve file found;
    130 interrupted (batch: run again with --resume).

    Examples:

      dipshape score LS-0042.csv

      dipshape score lumen_sector3/ --out results.jsonl

      dipshape score batch.parquet --registry models --model default-2026-12-02T0130Z

      dipshape score LS-0042.fits --ephemeris 3.52,1412.37,0.12

      dipshape score 'lumen/*.fits' lumen_batch.parquet --workers 2 --out results/

      dipshape score manifest.csv --scheduler tcp://10.0.0.5:8786 --out results/ --resume

      cat lumen_alerts.jsonl | dipshape score --stdin > lumen_scores.jsonl
    """
    import os

    from service.scoring import parse_ephemeris

    batch_mode = any(v is not None for v in (scheduler, workers, chunk_size, fmt)) or resume \
        or (out is not None and out.endswith(("/", os.sep)))
    from service.batch import DEFAULT_CHUNK_SIZE, plan_inputs
    from service.scoring import find_inputs

    try:
        known = None if ephemeris is None else parse_ephemeris(ephemeris)
        if stdin:
            _check_stdin_options(paths, out, batch_mode)
        elif batch_mode:
            _check_batch_options(out, scheduler, workers, fmt)
            plan = plan_inputs(paths or [], chunk_size=chunk_size or DEFAULT_CHUNK_SIZE)
        else:
            files = find_inputs(paths or [])
        root, model, ood = _score_model(registry, model_version)
    except DipshapeError as err:
        raise _fail(err) from err
    if stdin:
        _score_stdin(model, ood, known)
    elif batch_mode:
        _score_batch(plan, Path(out or ""), root, model, ood, known, scheduler=scheduler,
                     workers=workers, fmt=fmt or "parquet", resume=resume, progress=progress)
    else:
        _score_files(files, None if out is None else Path(out), model, ood, known, progress)


def _score_model(registry: Path | None, version: str | None):
    """The registry root, the verified model and its training-range table."""
    from features.catalog import FEATURE_VERSION
    from service.scoring import check_model, default_registry_root, load_ood
    from training.registry import load_model

    root = registry if registry is not None else default_registry_root()
    model = load_model(root, version, expected_feature_version=FEATURE_VERSION)
    check_model(model)
    return root, model, load_ood(root, model.card.version)


def _check_stdin_options(paths: list[Path] | None, out: str | None, batch_mode: bool) -> None:
    if paths or out is not None or batch_mode:
        raise ParameterError(
            "invalid_parameter", "--stdin reads standard input and writes standard output: "
            "give no PATH, --out or batch option with it")


def _check_batch_options(out: str | None, scheduler: str | None, workers: int | None,
                         fmt: str | None) -> None:
    from service.batch import PART_FORMATS

    if not out:
        raise ParameterError("invalid_parameter",
                             "batch mode writes parts into a folder: give --out DIR/")
    if scheduler is not None and workers is not None:
        raise ParameterError("invalid_parameter",
                             "give --scheduler (an existing cluster) or --workers (a local "
                             "one), not both")
    if fmt is not None and fmt not in PART_FORMATS:
        raise ParameterError("unsupported_format",
                             f"--format must be one of {', '.join(PART_FORMATS)}; got {fmt!r}")


def _score_files(files: list[Path], out: Path | None, model, ood, known,
                 progress: bool | None) -> None:
    """The classic mode: one JSON line per segment to a file or standard output."""
    from tqdm import tqdm

    from service.scoring import json_line, score_path

    n_scored = n_failed = 0
    sink = None
    if out is not None:
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
            sink = out.open("w", encoding="utf-8")
        except OSError as exc:
            hint = " (end it with / for batch mode)" if out.is_dir() else ""
            raise _fail(ParameterError(
                "unwritable_output", f"--out {out}: {exc.strerror or exc}{hint}")) from exc
    try:
        with tqdm(total=len(files), desc="scoring", unit="file", file=sys.stderr,
                  leave=False, disable=None if progress is None else not progress) as bar:
            for path in files:
                try:
                    lines = score_path(path, model, ephemeris=known, ood=ood)
                except DipshapeError as err:
                    raise _fail(err) from err
                for line in lines:
                    failed = "error" in line
                    n_failed += failed
                    n_scored += not failed
                    text = json_line(line)
                    if sink is None:
                        typer.echo(text)
                    else:
                        sink.write(text + "\n")
                if sink is not None:
                    sink.flush()
                bar.update(1)
    finally:
        if sink is not None:
            sink.close()
    where = f" -> {out}" if out is not None else ""
    typer.echo(f"scored {n_scored} segment(s) from {len(files)} file(s) with model "
               f"{model.card.version}; {n_failed} failed{where}", err=True)
    if n_failed:
        raise typer.Exit(EXIT_FAILURE)


def _score_stdin(model, ood, known) -> None:
    """--stdin: segment JSON lines in, result lines out, flushed one by one."""
    from service.batch import score_stream

    try:
        scored, failed = score_stream(sys.stdin, sys.stdout, model, ood=ood, ephemeris=known)
    except DipshapeError as err:
        raise _fail(err) from err
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        raise typer.Exit(EXIT_INTERRUPTED) from None
    typer.echo(f"scored {scored} line(s) with model {model.card.version}; {failed} failed",
               err=True)
    if failed:
        raise typer.Exit(EXIT_FAILURE)


def _score_batch(plan, folder: Path, root: Path, model, ood, known, *, scheduler: str | None,
                 workers: int | None, fmt: str, resume: bool, progress: bool | None) -> None:
    """Batch mode: chunks as tasks, one part per chunk in DIR, manifest and summary."""
    import contextlib

    from service.batch import PortableModel, cluster_client, part_paths, run_batch

    try:
        portable = PortableModel.from_registry(root, model, ood)
        on_cluster = (scheduler is not None or workers is not None) and plan.n_chunks > 1
        with (cluster_client(scheduler=scheduler, workers=workers) if on_cluster
              else contextlib.nullcontext()) as client:
            summary = run_batch(plan, portable, folder, fmt=fmt, resume=resume, client=client,
                                ephemeris=known, progress=progress)
    except DipshapeError as err:
        raise _fail(err) from err
    except KeyboardInterrupt:
        done = sum(p.is_file() for p in part_paths(folder, plan.n_chunks, fmt))
        typer.echo(f"interrupted: {done} of {plan.n_chunks} chunk(s) have their part in "
                   f"{folder}; run the same command with --resume to finish", err=True)
        raise typer.Exit(EXIT_INTERRUPTED) from None
    typer.echo(summary.text(), err=True)
    typer.echo(CAUTION, err=True)
    if summary.failed or not summary.complete:
        raise typer.Exit(EXIT_FAILURE)


_PRESETS: dict[str, dict[str, float]] = {
    # n: simulated segments (balanced over the five classes); seed: of the simulation and split;
    # min_dip_snr: planets, binaries and comets are drawn again until their dip reaches this SNR
    # (a survey only passes on dips it detected; training/simulate.py)
    "default": {"n": 30_000, "seed": 0, "min_dip_snr": 10.0},
    "small": {"n": 1_500, "seed": 0, "min_dip_snr": 10.0},
}


def _registry_or_default(registry: Path | None) -> Path:
    from service.scoring import default_registry_root

    return registry if registry is not None else default_registry_root()


@app.command()
def train(
    preset: Annotated[str, typer.Option(
        "--preset", help=f"Simulated training set: {', '.join(_PRESETS)} (segments and seed).")
    ] = "default",
    simulated: Annotated[int | None, typer.Option(
        "--simulated", min=0, help="Number of simulated segments (overrides the preset).")] = None,
    labels: Annotated[Path | None, typer.Option(
        "--labels", help="CSV of the group's own labels (id,label; id = a file stem).")] = None,
    segments: Annotated[Path | None, typer.Option(
        "--segments", help="Folder holding the labelled light curves.")] = None,
    name: Annotated[str, typer.Option("--name", help="Model name.")] = "default",
    version: Annotated[str | None, typer.Option(
        "--version", help="Version folder name (default: NAME-<UTC time>).")] = None,
    seed: Annotated[int | None, typer.Option("--seed", help="Seed (overrides the preset).")] = None,
    registry: Annotated[Path | None, typer.Option(
        "--registry", help="Model registry folder (default: ./models, else the shipped one).")
    ] = None,
    jobs: Annotated[int, typer.Option("--jobs", "-j", min=1, help="Parallel processes.")] = 1,
    cache: Annotated[Path | None, typer.Option(
        "--cache", help="Folder caching feature tables (keyed by FEATURE_VERSION).")] = None,
) -> None:
    """Train a calibrated classifier and register it as a new, inactive model version.

    The simulated part is reproducible from the preset (or --simulated/--seed); a group's own
    labelled light curves can be added with --labels and --segments (labels may name classes
    beyond the five built in). The new version is not active until `dipshape models activate`
    or `dipshape models promote`.

    Examples:

      dipshape train --preset default --jobs 2

      dipshape train --labels labels.csv --segments my_segments/ --simulated 5000 --name group
    """
    import shlex

    import pandas as pd

    from training.dataset import labelled_table, simulated_table
    from training.train import ORIGIN_COLUMN, train_and_save

    if preset not in _PRESETS:
        raise _fail(ParameterError(
            "invalid_parameter", f"--preset must be one of {', '.join(_PRESETS)}, got {preset!r}"))
    if (labels is None) != (segments is None):
        raise _fail(ParameterError("invalid_parameter",
                                   "--labels and --segments go together"))
    n = int(_PRESETS[preset]["n"]) if simulated is None else simulated
    seed_ = int(_PRESETS[preset]["seed"]) if seed is None else seed
    min_dip_snr = float(_PRESETS[preset]["min_dip_snr"])
    # the exact command that reproduces this model (recorded in its card)
    command = ["dipshape", "train", "--preset", preset, "--simulated", str(n), "--seed",
               str(seed_), "--name", name]
    if labels is not None and segments is not None:
        command += ["--labels", str(labels), "--segments", str(segments)]
    try:
        parts = []
        if n > 0:
            parts.append(simulated_table(n, seed=seed_, n_jobs=jobs, progress=True,
                                         cache_dir=cache, min_dip_snr=min_dip_snr))
        if labels is not None and segments is not None:
            own, summary = labelled_table(labels, segments, n_jobs=jobs, progress=True)
            typer.echo(f"group labels: {summary}", err=True)
            parts.append(own)
        if not parts:
            raise ParameterError("invalid_parameter", "nothing to train on: --simulated 0 and "
                                 "no --labels")
        # a single part keeps its provenance (attrs) for the model card; mixed parts are
        # tagged so the report evaluates the group's held-out labels apart
        if len(parts) == 1:
            table = parts[0]
        else:
            sources = [dict(p.attrs.get("source", {})) for p in parts]
            table = pd.concat([p.assign(**{ORIGIN_COLUMN: origin}) for p, origin
                               in zip(parts, ("simulated", "group"), strict=True)],
                              ignore_index=True)
            table.attrs = {"source": {"kind": "mixed", "parts": sources}}
        from threadpoolctl import threadpool_limits

        with threadpool_limits(1):
            card = train_and_save(table, registry=_registry_or_default(registry), name=name,
                                  seed=seed_, command=shlex.join(command), version=version)
    except DipshapeError as err:
        raise _fail(err) from err
    f1, ece = _headline(card)
    typer.echo(f"registered {card.version} (not active): macro-F1 {f1}, ECE {ece} on its "
               "held-out test split; see its report/report.html")


def _headline(card) -> tuple[str, str]:
    """Macro-F1 and ECE of the calibrated model from a card's metrics (or '?')."""
    for row in card.metrics.get("models", []):
        if row.get("name") == "calibrated":
            f1, ece = row.get("macro_f1"), row.get("ece")
            return (f"{f1:.3f}" if f1 is not None else "?", f"{ece:.3f}" if ece is not None
                    else "?")
    return "?", "?"


@app.command()
def serve(
    host: Annotated[str, typer.Option("--host", help="Address to listen on (beyond loopback "
                                      "only with API keys).")] = "127.0.0.1",
    port: Annotated[int, typer.Option("--port", min=0, max=65535)] = 8000,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Worker processes (about "
                                         "one per core).")] = 1,
    registry: Annotated[Path | None, typer.Option(
        "--registry", help="Model registry (default: ./models, else the shipped one).")] = None,
    db: Annotated[Path | None, typer.Option(
        "--db", help="SQLite store of labels (default: ./dipshape-store.sqlite).")] = None,
    keys_file: Annotated[Path | None, typer.Option(
        "--keys-file", help="API keys file (lines NAME ROLES SHA256; see `dipshape keys new`)."
    )] = None,
) -> None:
    """Run the REST scoring service (OpenAPI at /docs).

    Every setting can also come from the environment as DIPSHAPE_<NAME> (e.g.
    DIPSHAPE_MAX_BODY_BYTES, DIPSHAPE_MAX_BATCH, DIPSHAPE_REQUEST_TIMEOUT_S,
    DIPSHAPE_API_KEYS); options given here win. Without API keys the service runs open and
    only on loopback.

    Examples:

      dipshape serve --port 8000

      dipshape serve --host 0.0.0.0 --workers 2 --keys-file keys.txt
    """
    import os

    import uvicorn
    from pydantic import ValidationError

    from service.app import check_bind
    from service.settings import ServiceSettings

    given = {"host": host, "port": port, "workers": workers, "registry": registry, "db": db,
             "keys_file": keys_file}
    given = {k: v for k, v in given.items() if v is not None}
    try:
        settings = ServiceSettings(**given)
        check_bind(settings)
    except ValidationError as exc:
        raise _fail(ParameterError("invalid_parameter", str(exc))) from exc
    except DipshapeError as err:
        raise _fail(err) from err
    # worker processes rebuild the settings from the environment
    for key, value in given.items():
        os.environ[f"DIPSHAPE_{key.upper()}"] = str(value)
    typer.echo(f"dipshape serving on http://{settings.host}:{settings.port} "
               f"({settings.workers} worker(s)); OpenAPI at /docs. {CAUTION}", err=True)
    uvicorn.run("service.app:app_from_env", factory=True, host=settings.host,
                port=settings.port, workers=settings.workers, log_level="warning")


@app.command()
def plot(
    path: Annotated[Path, typer.Argument(help="A light-curve file (one segment).")],
    out: Annotated[Path | None, typer.Option("--out", help="PNG to write (default: "
                                             "<stem>.png).")] = None,
    ephemeris: Annotated[str | None, typer.Option(
        "--ephemeris", help="Known PERIOD,EPOCH,DURATION in days.")] = None,
    model: Annotated[str | None, typer.Option("--model", help="Model version.")] = None,
    registry: Annotated[Path | None, typer.Option("--registry")] = None,
    width: Annotated[int, typer.Option("--width", min=300, max=4000)] = 1200,
    height: Annotated[int, typer.Option("--height", min=300, max=4000)] = 900,
) -> None:
    """Draw the diagnostic plot of a segment: events, shape fits, fold, probabilities.

    Example:

      dipshape plot demo_data/LS-0042-s3.csv --out LS-0042.png
    """
    from features.catalog import FEATURE_VERSION
    from features.io import read_segment
    from service.plots import diagnostic_png
    from service.scoring import load_ood, parse_ephemeris, score_segment_with_features
    from training.registry import load_model

    root = _registry_or_default(registry)
    try:
        eph = parse_ephemeris(ephemeris) if ephemeris else None
        loaded = load_model(root, model, expected_feature_version=FEATURE_VERSION)
        segment = read_segment(path)
        result, feats = score_segment_with_features(
            segment, loaded, ephemeris=eph, ood=load_ood(root, loaded.card.version))
        png = diagnostic_png(segment, feats, result.to_dict(), width_px=width,
                             height_px=height)
    except DipshapeError as err:
        raise _fail(err) from err
    target = out or Path(f"{segment.id}.png")
    target.write_bytes(png)
    typer.echo(f"{segment.id}: {result.label} ({result.probabilities[result.label]:.2f}); "
               f"plot written to {target}")


keys_app = typer.Typer(help="API keys of the REST service.", no_args_is_help=True,
                       rich_markup_mode="markdown")
app.add_typer(keys_app, name="keys")


@keys_app.command("new")
def keys_new(
    name: Annotated[str, typer.Argument(help="Who the key is for, e.g. broker-a.")],
    roles: Annotated[str, typer.Option("--roles", help="Comma-separated: score, label, "
                                       "admin.")] = "score",
) -> None:
    """Make a new API key: prints the key (give it to the client, once) and the keys-file line.

    Example:

      dipshape keys new broker-a --roles score,label
    """
    from service.auth import hash_key, new_key, parse_keys

    key = new_key()
    line = f"{name} {roles} {hash_key(key)}"
    try:
        parse_keys([line], where="the new key")
    except DipshapeError as err:
        raise _fail(err) from err
    typer.echo(f"key (give it to {name}; it is not stored anywhere): {key}")
    typer.echo(f"keys-file line: {line}")


models_app = typer.Typer(help="List, inspect, activate and promote model versions.",
                         no_args_is_help=True, rich_markup_mode="markdown")
app.add_typer(models_app, name="models")

_RegistryOpt = Annotated[Path | None, typer.Option(
    "--registry", help="Model registry folder (default: ./models, else the shipped one).")]


@app.command()
def evaluate(
    version: Annotated[str | None, typer.Argument(
        help="Model version (default: the registry's active one).", show_default=False)] = None,
    registry: _RegistryOpt = None,
    n: Annotated[int, typer.Option("--n", min=50, help="Fresh simulated segments.")] = 2000,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the simulated set.")] = 777,
    min_dip_snr: Annotated[float, typer.Option(
        "--min-dip-snr", min=0.0, help="Detection selection of the simulated planets, binaries "
        "and comets (as in the training presets).")] = 10.0,
    labels: Annotated[Path | None, typer.Option(
        "--labels", help="Evaluate on a group's labels instead (id,label CSV).")] = None,
    segments: Annotated[Path | None, typer.Option(
        "--segments", help="Folder of the labelled light curves.")] = None,
    out: Annotated[Path | None, typer.Option(
        "--out", help="Write metrics.json, figures and report.html to this folder.")] = None,
    jobs: Annotated[int, typer.Option("--jobs", "-j", min=1)] = 1,
) -> None:
    """Evaluate a registered model on data it never saw: a fresh simulated set, or a
    group's labelled light curves. Prints macro-F1, ECE and per-class precision and recall,
    beside the BIC model-comparison baseline; --out writes the full report.

    Examples:

      dipshape evaluate --n 2000 --seed 777

      dipshape evaluate group-2026-12-02T0300Z --labels labels.csv --segments my_segments/
    """
    from threadpoolctl import threadpool_limits

    from features.catalog import FEATURE_VERSION
    from training import report
    from training.dataset import labelled_table, simulated_table
    from training.registry import load_model
    from training.train import evaluate_baseline, evaluate_model

    if (labels is None) != (segments is None):
        raise _fail(ParameterError("invalid_parameter", "--labels and --segments go together"))
    root = _registry_or_default(registry)
    try:
        loaded = load_model(root, version, expected_feature_version=FEATURE_VERSION)
        if labels is not None and segments is not None:
            table, summary = labelled_table(labels, segments, n_jobs=jobs, progress=True)
            where = f"{summary['n_rows']} labelled segments of {segments}"
        else:
            table = simulated_table(n, seed=seed, n_jobs=jobs, progress=True,
                                    min_dip_snr=min_dip_snr)
            where = f"{len(table)} fresh simulated segments (seed {seed})"
        classes = list(loaded.card.classes)
        with threadpool_limits(1):
            metrics = evaluate_model(loaded.estimator, table, classes=classes)
        baseline = evaluate_baseline(table, classes)
    except DipshapeError as err:
        raise _fail(err) from err
    typer.echo(f"{loaded.card.version} on {where}: macro-F1 {metrics['macro_f1']:.3f}, "
               f"ECE {metrics['ece']:.3f}, accuracy {metrics['accuracy']:.3f} "
               f"(BIC baseline: macro-F1 {baseline['macro_f1']:.3f})")
    for name, row in metrics["per_class"].items():
        if row["support"]:
            typer.echo(f"  {name:17s} precision {row['precision']:.3f}  recall "
                       f"{row['recall']:.3f}  ({row['support']} segments)")
    if out is not None:
        figures = {"confusion_matrix": report.plot_confusion_matrix(metrics),
                   "reliability": report.plot_reliability(metrics)}
        if metrics.get("by_snr"):
            figures["recall_vs_snr"] = report.plot_recall_vs_snr(metrics)
        page = report.write_report(out, title=f"dipshape model {loaded.card.version}: {where}",
                                   metrics=metrics, figures=figures,
                                   comparison=report.compare({"model": metrics,
                                                              "baseline": baseline}))
        typer.echo(f"report written to {page}")
    typer.echo(CAUTION)


@models_app.command("list")
def models_list(registry: _RegistryOpt = None) -> None:
    """List the model versions of a registry (the active one marked with *)."""
    from training.registry import list_models

    try:
        cards = list_models(_registry_or_default(registry))
    except DipshapeError as err:
        raise _fail(err) from err
    for card in cards:
        mark = "*" if card.active else " "
        f1, ece = _headline(card)
        typer.echo(f"{mark} {card.version}  {card.name}  {card.created_utc}  macro-F1 {f1}  "
                   f"ECE {ece}")


@models_app.command("show")
def models_show(version: str, registry: _RegistryOpt = None) -> None:
    """Print the card (classes, features, training data, metrics, hashes) of a version."""
    import json

    from training.registry import read_card

    try:
        card = read_card(_registry_or_default(registry), version)
    except DipshapeError as err:
        raise _fail(err) from err
    typer.echo(json.dumps(card.to_dict(), indent=2))


@models_app.command("activate")
def models_activate(version: str, registry: _RegistryOpt = None) -> None:
    """Make a version the active one (atomic)."""
    from training.registry import activate

    try:
        activate(_registry_or_default(registry), version)
    except DipshapeError as err:
        raise _fail(err) from err
    typer.echo(f"active: {version}")


@models_app.command("promote")
def models_promote(
    version: str,
    registry: _RegistryOpt = None,
    n: Annotated[int, typer.Option("--n", min=50, help="Fresh simulated segments to compare on.")
                 ] = 1000,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the comparison set.")] = 12345,
    min_dip_snr: Annotated[float, typer.Option(
        "--min-dip-snr", min=0.0, help="Detection selection of the comparison set's planets, "
        "binaries and comets (as in the training presets).")] = 10.0,
    force: Annotated[bool, typer.Option("--force", help="Activate even if it is worse.")] = False,
    jobs: Annotated[int, typer.Option("--jobs", "-j", min=1)] = 1,
) -> None:
    """Activate a version only if it is at least as good as the active one.

    Both models are evaluated on the same fresh simulated set (with the detection selection of
    the training presets: the dips a survey would pass on); a candidate with a lower macro-F1 is
    refused unless --force.

    Example:

      dipshape models promote default-2026-12-02T0130Z --n 2000
    """
    from features.catalog import FEATURE_VERSION
    from training.dataset import simulated_table
    from training.registry import activate, active_version, load_model
    from training.train import evaluate_model

    root = _registry_or_default(registry)
    try:
        candidate = load_model(root, version, expected_feature_version=FEATURE_VERSION)
        current = active_version(root)
        table = simulated_table(n, seed=seed, n_jobs=jobs, progress=True,
                                min_dip_snr=min_dip_snr)
        new = evaluate_model(candidate.estimator, table, classes=list(candidate.card.classes))
        typer.echo(f"candidate {version}: macro-F1 {new['macro_f1']:.4f}")
        if current is not None and current != version:
            active = load_model(root, current, expected_feature_version=FEATURE_VERSION)
            old = evaluate_model(active.estimator, table, classes=list(active.card.classes))
            typer.echo(f"active    {current}: macro-F1 {old['macro_f1']:.4f}")
            if new["macro_f1"] < old["macro_f1"] and not force:
                typer.echo(f"refused: {version} is worse than the active {current} on the same "
                           "set (use --force to activate anyway)", err=True)
                raise typer.Exit(EXIT_FAILURE)
        activate(root, version)
    except DipshapeError as err:
        raise _fail(err) from err
    typer.echo(f"active: {version}")


def main() -> None:  # pragma: no cover - console entry point
    """Run the CLI."""
    app()

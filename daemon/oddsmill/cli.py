"""The `oddsmill` command: `main(argv=None) -> int`. Parses, validates, builds, runs.

Exit codes: 0 success; 2 bad usage or bad input file (one line naming it); 1 any other failure.
"""

from __future__ import annotations

import argparse
import gc
import json
import logging
import os
import sys
import tomllib
from collections.abc import Iterator
from dataclasses import fields
from itertools import chain
from pathlib import Path
from typing import Any

import numpy as np

from .errors import CheckpointError, ConfigError, InputFileError, OddsmillError, UsageError
from .reference import Z95, AliasedError, NoOptimumError

log = logging.getLogger("oddsmill")

LEARNER_FLAGS = {  # flag -> (setting, type)
    "schedule": str,
    "eta0": float,
    "l2": float,
    "decay": float,
    "power": float,
    "adagrad_delta": float,
    "average_start": int,
    "scaling": str,
    "scale_warmup": int,
    "max_features": int,
    "max_centred": int,
}


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        raise UsageError(f"{self.prog}: {message}")


def _learner_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("learner")
    g.add_argument("--config", help="a TOML file of settings (its [learner] table); flags win")
    g.add_argument(
        "--schedule",
        choices=["constant", "inverse-time", "power", "adagrad"],
        help="the learning rate's (default power)",
    )
    g.add_argument("--eta0", type=float, help="initial learning rate (default 0.5)")
    g.add_argument("--l2", type=float, help="L2 penalty lambda on standardised coefficients (default 1e-4)")
    g.add_argument("--decay", type=float, help="the power schedule's a (default 0.03)")
    g.add_argument("--power", type=float, help="the power schedule's c (default 0.75)")
    g.add_argument("--adagrad-delta", dest="adagrad_delta", type=float, metavar="D", help="AdaGrad's delta (default 1)")
    g.add_argument(
        "--average",
        dest="average",
        action="store_true",
        default=None,
        help="Polyak-Ruppert averaging (default on)",
    )
    g.add_argument("--no-average", dest="average", action="store_false", help="score with the last iterate")
    g.add_argument(
        "--average-start", dest="average_start", type=int, metavar="STEP", help="average from this step on (default 0)"
    )
    g.add_argument(
        "--scaling",
        choices=["standardize", "none"],
        help="divide each numeric feature by its standard deviation (default standardize), or learn on raw values",
    )
    g.add_argument(
        "--scale-warmup",
        dest="scale_warmup",
        type=int,
        metavar="N",
        help="values a feature's standard deviation is taken over, then frozen (default 1000)",
    )
    g.add_argument(
        "--max-features",
        dest="max_features",
        type=int,
        metavar="N",
        help="the vocabulary's cap; later new names are ignored and counted (default 1000000)",
    )
    g.add_argument(
        "--max-centred",
        dest="max_centred",
        type=int,
        metavar="N",
        help="frequent features the optimiser may centre (default 64)",
    )
    g.add_argument("--window", type=int, default=None, metavar="N", help="events in the metrics window (default 10000)")


def learner_settings(args: argparse.Namespace) -> tuple[Any, bool, int]:
    """(LearnerSettings, whether average_start was given, window) from --config and flags."""
    from .settings import LearnerSettings

    values, window = learner_values(args)
    return LearnerSettings(**values), "average_start" in values, WINDOW if window is None else window


WINDOW = 10_000  # labelled events in the metrics' window, unless --window or [learner] window says


def learner_values(args: argparse.Namespace) -> tuple[dict[str, Any], int | None]:
    """(the learner settings given by --config and flags, by name; the window, None if not given)."""
    from .settings import LearnerSettings

    values: dict[str, Any] = {}
    window = None
    if args.config:
        table = read_config(args.config).get("learner", {})
        known = {f.name for f in fields(LearnerSettings)} | {"window"}
        for key, value in table.items():
            if key not in known:
                raise ConfigError(f"{args.config}: unknown setting learner.{key}; known: {', '.join(sorted(known))}")
            if key == "window":
                window = value
            else:
                values[key] = value
    for flag in list(LEARNER_FLAGS) + ["average"]:
        v = getattr(args, flag, None)
        if v is not None:
            values[flag] = v
    if args.window is not None:
        window = args.window
    if window is not None and (isinstance(window, bool) or not isinstance(window, int) or window < 1):
        raise ConfigError(f"window must be an integer >= 1, got {window!r}")
    return values, window


def print_candidates(rows: list[dict[str, Any]], indent: str) -> None:
    """A race's candidates (`Race.table()`'s rows) in columns: log-loss since the start, recent
    (windowed) log-loss, and "<- serves" beside the serving one. The names' column is as wide as
    the longest name (up to 64 characters); at a fixed 28 the figures of a longer name, as the auto
    grid's "eta0=0.125,l2=0.0001,no-average", stood out of their columns."""
    width = max(28, *(len(row["candidate"]) + 2 for row in rows))
    print(f"{indent}{'candidate':<{width}}{'log-loss':>10}{'recent':>10}")
    for row in rows:
        mark = "  <- serves" if row["serving"] else ""
        print(f"{indent}{row['candidate']:<{width}}{row['log_loss']:>10.5f}{row['log_loss_window']:>10.5f}{mark}")


def candidates_of(args: argparse.Namespace, base: Any) -> list[Any]:
    """The race's candidates: `--candidates auto` (a grid around the learner settings), or the
    `[candidates.NAME]` tables of --config (learner settings over the [learner] table); [] if none."""
    from .race import Candidate, auto_candidates, check_candidates
    from .settings import LearnerSettings

    choice = getattr(args, "candidates", None)
    if choice is not None and choice != "auto":
        raise UsageError(f"--candidates takes auto (or give [candidates.NAME] tables in --config), got {choice!r}")
    tables = read_config(args.config).get("candidates", {}) if args.config else {}
    if choice == "auto" and tables:
        raise UsageError("--candidates auto and [candidates] tables in the config: choose one")
    if choice == "auto":
        return auto_candidates(base)
    out = []
    for name, table in tables.items():
        if not isinstance(table, dict):
            raise ConfigError(f"{args.config}: candidates.{name} must be a table of learner settings")
        try:
            out.append(Candidate(name, LearnerSettings.from_dict({**base.to_dict(), **table})))
        except (TypeError, ValueError) as e:
            raise ConfigError(f"{args.config}: candidates.{name}: {e}") from None
    if out:
        check_candidates(out)
    return out


def read_config(path: str) -> dict[str, Any]:
    """The TOML file of --config: a [learner] table and, for serve, a [server] table."""
    try:
        with open(path, "rb") as f:
            doc = tomllib.load(f)
    except OSError as e:
        raise ConfigError(f"{path}: cannot read ({e.strerror})") from None
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"{path}: not valid TOML ({e})") from None
    for key, value in doc.items():
        if key not in ("learner", "server", "candidates") or not isinstance(value, dict):
            raise ConfigError(
                f"{path}: unknown table or key {key!r}; the file has [learner], [server] and [candidates.NAME] tables"
            )
    return doc


# -- replay ----------------------------------------------------------------------------------------
def cmd_replay(args: argparse.Namespace) -> int:
    from .offline import new_engine, replay
    from .storage import hold_state_dir

    if args.epochs < 1:
        raise UsageError(f"--epochs must be >= 1, got {args.epochs}")
    settings, given, window = learner_settings(args)
    candidates = candidates_of(args, settings)
    state = Path(args.state)
    if state.exists():  # a directory a daemon serves is refused before the replay, not after it
        hold_state_dir(state)
        refuse_a_state(state)
    if candidates:
        return replay_race(args, candidates, window)
    engine, tail = new_engine(settings, args.epochs, given, window=window)
    report = replay(engine, args.logs, args.epochs, tail)
    refuse_nothing_learned(args.logs, state, engine, report.events)
    hold_state_dir(state)
    path = save_replay(state, engine.learner.step, checkpoint_state(engine))
    m = engine.metrics
    rej = sum(engine.counters.rejected.values())
    compiled = f", and {report.compiling:.0f} s compiling first" if report.compiling >= 0.5 else ""
    print(
        f"learned {engine.learner.step:,} events from {report.events:,} messages in "
        f"{report.epochs} epoch(s), {report.seconds:.1f} s "
        f"({engine.learner.step / max(report.seconds, 1e-9):,.0f} events/s){compiled}"
    )
    print(f"progressive log-loss {m.log_loss:.5f}; last {min(m.count, m.window):,} events {m.log_loss_window:.5f}")
    if rej:
        print(f"rejected {rej:,}: " + ", ".join(f"{k} {v:,}" for k, v in sorted(engine.counters.rejected.items())))
    full = engine.learner.vocab.full_note()
    if full:
        print(full)
    print(f"checkpoint {path}")
    return 0


def refuse_nothing_learned(logs: list[str], state: Path, engine: Any, messages: int) -> None:
    """nothing_learned's error, and the state directory let go of, when a replay learned no event."""
    from .offline import nothing_learned
    from .storage import release_state_dir

    error = nothing_learned(logs, engine, messages)
    if error is not None:
        release_state_dir(state)
        raise error


def refuse_a_state(state: Path) -> None:
    """ConfigError, and the directory let go of, when `state` holds a state already. A replay
    begins a state: its checkpoint beside another state's would be resumed from with that state's
    journal learned again on top (a served directory's whole journal: every event twice), or be
    passed over for a checkpoint of a later step, and it could push that state's checkpoints out."""
    from .storage import list_checkpoints, list_journal, release_state_dir

    checkpoints, segments = list_checkpoints(state), list_journal(state)
    if not checkpoints and not segments:
        return
    release_state_dir(state)
    held = []
    if checkpoints:
        held.append(f"checkpoints to {checkpoints[-1].name}" if len(checkpoints) > 1 else checkpoints[0].name)
    if segments:
        held.append(f"a journal of {segments_of(segments)}")
    raise ConfigError(
        f"{state} holds a state already ({', '.join(held)}): replay begins a new one. Give a new or "
        "empty directory (to learn a state's journal again with other settings: replay DIR --state "
        "NEW-DIR), or send the logs to the daemon that serves it"
    )


def segments_of(segments: list[Path]) -> str:
    """A journal's size in segments, for a message: "1 segment", "3 segments"."""
    return f"{len(segments)} segment{'' if len(segments) == 1 else 's'}"


def save_replay(state_dir: Path, step: int, state: dict[str, Any]) -> Path:
    """A replay's checkpoint, written; a failure (a full disk, a directory not writable) is one
    line (OddsmillError: exit 1), not a traceback, and leaves no partial file."""
    from .storage import write_checkpoint

    try:
        return write_checkpoint(state_dir, step, state)
    except OSError as e:
        raise OddsmillError(
            f"cannot write the checkpoint into {state_dir} ({e.strerror or e}): the {step:,} events learned "
            "are not saved"
        ) from None


def replay_race(args: argparse.Namespace, candidates: list[Any], window: int) -> int:
    """`replay --candidates`: the race on a log, offline; the table, and a checkpoint serve resumes."""
    from .offline import read_items, run_logs
    from .race import Race
    from .storage import hold_state_dir

    if args.epochs != 1:
        raise UsageError("--candidates races over one pass of the logs: leave out --epochs")
    race = Race(candidates, window)
    messages = run_logs(race, read_items(args.logs))
    refuse_nothing_learned(args.logs, Path(args.state), race.engine, messages)
    state = checkpoint_state(race.engine)
    state["race"] = race.state_dict(compact=True)
    hold_state_dir(Path(args.state))
    path = save_replay(Path(args.state), race.engine.learner.step, state)
    if args.json:
        print(json.dumps({"candidates": race.table(), "switches": race.switches}, indent=2))
        return 0
    print_candidates(sorted(race.table(), key=lambda r: r["log_loss_window"]), "")
    for sw in race.switches:
        print(
            f"switch at labelled event {sw['at']:,}: {sw['from']} -> {sw['to']} "
            f"(recent log-loss {sw['from_log_loss_window']:.5f} -> {sw['to_log_loss_window']:.5f})"
        )
    print(f"checkpoint {path}")
    return 0


def checkpoint_state(engine: Any) -> dict[str, Any]:
    import time

    return {
        "kind": "oddsmill-state",
        "created": time.time(),
        "engine": engine.state_dict(compact=True),
        "journal": None,
    }


def load_engine(target: str) -> Any:
    return load_state(target)[0]


def load_state(target: str) -> tuple[Any, float, Any, dict[str, Any] | None]:
    """(engine, when its checkpoint was written, the race or None, the journal position it covers
    or None) of a state directory or a checkpoint file; in a race, the engine is the serving
    candidate's."""
    from .engine import Engine
    from .storage import list_journal, load_newest, read_checkpoint

    p = Path(target)
    if p.is_dir():
        found = load_newest(p)
        if found is None:
            segments = list_journal(p)
            if segments:  # a daemon that has not written its first checkpoint yet, or was killed first
                size = sum(seg.stat().st_size for seg in segments)
                raise CheckpointError(
                    f"{target}: no checkpoint yet, but a journal ({segments_of(segments)}, {size:,} bytes): "
                    "`serve` learns it when it starts on this directory, and writes a checkpoint every "
                    "--checkpoint-seconds and when it stops"
                )
            raise CheckpointError(f"{target}: no checkpoint in this directory")
        state, _ = found
    elif p.exists():
        state = read_checkpoint(p)
    else:
        raise CheckpointError(f"{target}: no such file or directory")
    from .race import Race

    try:
        race = Race.from_state_dict(state["race"]) if "race" in state else None
        engine = race.engine if race is not None else Engine.from_state_dict(state["engine"])
        position = state.get("journal") if isinstance(state.get("journal"), dict) else None
        return engine, float(state.get("created", 0.0)), race, position
    except (KeyError, TypeError, ValueError) as e:
        raise CheckpointError(f"{target}: the checkpoint's content is not an oddsmill state ({e})") from None


# -- fit -----------------------------------------------------------------------------------------
def cmd_fit(args: argparse.Namespace) -> int:
    from .offline import fit_logs
    from .progressive import log_loss_from_logit

    settings, _, _ = learner_settings(args)
    res, design = fit_logs(args.logs, settings)
    out: dict[str, Any] = res.as_json()
    if args.against:
        engine = load_engine(args.against)
        c = engine.learner.coefficients()
        theirs = c.as_dict()
        mine = np.array([theirs.get(n, 0.0) for n in res.names])
        # relative error in standardised units (raw coefficient x scale)
        diff = np.linalg.norm((mine - res.coef[1:]) * design.scale)
        ref = np.linalg.norm(res.coef[1:] * design.scale)
        z = c.intercept + design.X @ mine
        ll = float(np.sum(design.w * log_loss_from_logit(z, design.y)) / res.n)
        out["against"] = {
            "state": args.against,
            "step": engine.learner.step,
            "relative_coef_error": float(diff / ref) if ref > 0 else float(diff),
            "intercept_error": float(c.intercept - res.coef[0]),
            "log_loss": ll,
            "log_loss_excess": ll - res.log_loss,
            "missing_features": sorted(set(res.names) - set(theirs)),
        }
    if args.json:
        print(json.dumps(out, indent=2, allow_nan=True))
        return 0
    print(
        f"Newton fit: n = {res.n:,}, {res.iterations} iterations, "
        f"{'converged' if res.converged else 'NOT converged'}, mean log-loss {res.log_loss:.6f}, "
        f"L2 = {settings.l2:g}"
    )
    head = f"{'feature':<28}{'coef':>11}{'std err':>10}{'z':>8}{'p-value':>10}  {'95% interval':<23}{'odds ratio':>11}"
    print(head)
    print("-" * len(head))
    rows = [("(intercept)", out["intercept"], None)] + [(r["feature"], r, r["odds_ratio"]) for r in out["coefficients"]]
    for name, r, odds in rows:
        lo, hi = r["ci95"]
        print(
            f"{name[:27]:<28}{r['coef']:>11.4f}{r['se']:>10.4f}{r['z']:>8.2f}{_pval(r['p_value']):>10}  "
            f"[{lo:>9.4f}, {hi:>9.4f}]{'' if odds is None else f'{odds:>#11.4g}':>11}"
        )
    print(f"z and intervals are Wald statistics (+-{Z95:.3f} standard errors).")
    for w in res.warnings:
        print(f"warning: {w.detail}")
    if args.against:
        a = out["against"]
        print(
            f"\nagainst {a['state']} (step {a['step']:,}): relative coefficient error "
            f"{a['relative_coef_error']:.2e} (standardised units), mean log-loss {a['log_loss']:.6f} "
            f"({a['log_loss_excess']:+.2e} from the optimum)"
        )
    return 0


def _pval(p: float) -> str:
    return "<1e-16" if p < 1e-16 else f"{p:.2g}" if p < 1e-3 else f"{p:.4f}"


# -- inspect ---------------------------------------------------------------------------------------
def inspect_json(engine: Any) -> dict[str, Any]:
    lr = engine.learner
    intercept, coefficients = lr.top_coefficients(lr.n_features)
    metrics = {k: v for k, v in engine.metrics.summary().items()}
    cnt = engine.counters
    metrics.update(
        {
            "events_train": cnt.train,
            "events_score": cnt.score,
            "events_outcome": cnt.outcome,
            "events_lost": cnt.lost,
            "events_rejected": dict(cnt.rejected),
            "pending_outcomes": len(engine.pending),
            "pending_expired": cnt.pending_expired,
            "pending_evicted": cnt.pending_evicted,
            "features_ignored": lr.vocab.ignored,
            "learning_rate": lr.learning_rate(),
            "calibration_bins": engine.metrics.calibration_bins(),
        }
    )
    return {
        "step": lr.step,
        "learner": lr.settings.to_dict(),
        "intercept": {"coef": intercept},
        "coefficients": [{k: c[k] for k in ("feature", "coef", "odds_ratio")} for c in coefficients],
        "metrics": metrics,
    }


def _checkpoint_line(target: Path, created: float, position: dict[str, Any] | None) -> str:
    """When the checkpoint was written and, for a state directory, how much of its journal came
    after it: a daemon serving the directory (and a restart) has learned that too, so the model
    shown is behind by it. (A state directory inspected while its daemon ran showed the
    checkpoint's model, step 0 after a start, with nothing to say the daemon was ahead.)"""
    import time

    from .storage import list_journal

    when = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(created)) if created else "at an unknown time"
    line = f"checkpoint written {when}"
    if not target.is_dir() or position is None:
        return line
    segments = list_journal(target)
    names = [p.name for p in segments]
    if position.get("segment") not in names:
        return line
    k = names.index(position["segment"])
    after = max(0, segments[k].stat().st_size - int(position["offset"]))
    after += sum(p.stat().st_size for p in segments[k + 1 :])
    if not after:
        return line + "; the journal has nothing after it"
    return (
        line + f"; the journal has {after:,} bytes after it, which a daemon serving this directory has learned"
        " too (its /api/status has the live figures) and a restart learns again"
    )


def cmd_inspect(args: argparse.Namespace) -> int:
    engine, created, race, position = load_state(args.state)
    doc = inspect_json(engine)
    if race is not None:
        doc["candidates"] = race.table()
        doc["switches"] = race.switches
    if args.top is not None:
        if args.top < 0:
            raise UsageError(f"--top must be >= 0, got {args.top}")
        doc["coefficients"] = doc["coefficients"][: args.top]
    if args.json:
        print(json.dumps(doc, indent=2))
        return 0
    s, m = doc["learner"], doc["metrics"]
    print(
        f"step {doc['step']:,}   features {engine.learner.n_features:,}   "
        f"learning rate {m['learning_rate']:.3g}   averaging {'on' if s['average'] else 'off'}"
    )
    print("settings: " + ", ".join(f"{k}={v}" for k, v in s.items()))
    print(_checkpoint_line(Path(args.state), created, position))
    if m["log_loss_count"]:
        print(
            f"progressive log-loss {m['log_loss']:.5f} over {int(m['log_loss_count']):,} labelled events; "
            f"window: log-loss {m['log_loss_window']:.5f}, Brier {m['brier_window']:.5f}, "
            f"calibration error {m['calibration_error_window']:.4f}"
        )
    else:
        print("no labelled events yet: no progressive log-loss")
    bins = [b for b in m["calibration_bins"] if b["count"]]
    if bins:  # (a table, as `watch` shows it: on one line it ran to 500 characters)
        print(f"reliability of the window's scores\n  {'band':<10}{'predicted':>10}{'observed':>10}{'events':>10}")
        for b in bins:
            band = f"{b['low']:.1f}-{b['high']:.1f}"
            print(f"  {band:<10}{b['mean_predicted']:>10.3f}{b['observed_rate']:>10.3f}{b['count']:>10,}")
    print(
        f"events: train {m['events_train']:,}, scored {m['events_score']:,}, outcomes {m['events_outcome']:,}, "
        f"lost {m['events_lost']:,}, rejected {sum(m['events_rejected'].values()):,}; "
        f"pending outcomes {m['pending_outcomes']:,}"
    )
    full = engine.learner.vocab.full_note()
    if full:
        print(full)
    if race is not None:
        from .watch import switches

        print(f"\nrace of {len(race.names)} candidates ({switches(len(race.switches))}); the model below serves")
        print_candidates(doc["candidates"], "  ")
    print(f"\n{'feature':<32}{'coef (raw units)':>18}{'odds ratio':>12}")
    print(f"{'(intercept)':<32}{doc['intercept']['coef']:>#18.5g}")
    for r in doc["coefficients"]:
        print(f"{r['feature'][:31]:<32}{r['coef']:>#18.5g}{r['odds_ratio']:>#12.4g}")
    return 0


# -- serve -------------------------------------------------------------------------------------------
SERVER_KEYS = {  # TOML key in [server] -> its flag's dest (the same name)
    "state": str,
    "ingest": str,
    "ingest_kind": str,
    "scores": str,
    "http": str,
    "warm_start": list,
    "checkpoint_events": int,
    "checkpoint_seconds": float,
    "segment_bytes": int,
    "block_max": int,
    "block_bytes": int,
    "pending_limit": int,
    "pending_ttl": float,
    "allow_insecure_bind": bool,
    "journal_keep": int,
    "fsync": str,
    "fsync_ms": float,
    "outage_hold_bytes": int,
    "curve_secret": str,
    "curve_clients": str,
    "ingest_hwm": int,
    "scores_hwm": int,
    "race_margin": float,
    "race_patience": int,
}


def serve_settings(args: argparse.Namespace) -> tuple[Any, Any, list[str] | None, dict[str, Any]]:
    """(ServerSettings, LearnerSettings, warm-start logs, the settings given that a state keeps:
    see `Server`'s `asked`) from defaults, the [server] table, flags."""
    from .server import ServerSettings
    from .settings import LearnerSettings

    asked, given_window = learner_values(args)
    learner = LearnerSettings(**asked)
    window = WINDOW if given_window is None else given_window
    if given_window is not None:
        asked["window"] = given_window
    values: dict[str, Any] = {"state": "state", "warm_start": None}
    if args.config:
        for key, value in read_config(args.config).get("server", {}).items():
            kind = SERVER_KEYS.get(key)
            if kind is None:
                raise ConfigError(
                    f"{args.config}: unknown setting server.{key}; known: {', '.join(sorted(SERVER_KEYS))}"
                )
            ok = isinstance(value, kind) and not (kind is not bool and isinstance(value, bool))
            if kind is float and isinstance(value, int) and not isinstance(value, bool):
                ok = True
            if not ok:
                raise ConfigError(f"{args.config}: server.{key} must be {kind.__name__}, got {value!r}")
            values[key] = value
    for key in SERVER_KEYS:
        flag = getattr(args, key, None)
        if flag is not None and flag is not False:
            values[key] = flag
    state = values.pop("state")
    warm = values.pop("warm_start")
    candidates = tuple(candidates_of(args, learner))
    asked.update(
        {k: values[k] for k in ("pending_limit", "pending_ttl", "race_margin", "race_patience") if k in values}
    )
    if candidates:
        asked["candidates"] = candidates
    server = ServerSettings(state_dir=Path(state), window=window, candidates=candidates, **values)
    return server, learner, warm, asked


def print_config(server: Any, learner: Any) -> None:
    """The effective configuration as TOML (what --config reads)."""

    def toml(v: Any) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str | Path):
            return json.dumps(str(v))
        if isinstance(v, list):
            return "[" + ", ".join(toml(x) for x in v) + "]"
        return repr(v)

    print("[learner]")
    for key, value in learner.to_dict().items():
        if value is not None:  # TOML has no nil: an absent decay means a = l2
            print(f"{key} = {toml(value)}")
    print(f"window = {server.window}")
    print("\n[server]")
    print(f"state = {toml(server.state_dir)}")
    for f in fields(server):
        if f.name not in ("state_dir", "window", "topic", "candidates"):
            print(f"{f.name} = {toml(getattr(server, f.name))}")
    base = learner.to_dict()
    for c in server.candidates:
        print(f"\n[candidates.{json.dumps(c.name)}]")
        for key, value in c.settings.to_dict().items():
            if value != base[key] and value is not None:
                print(f"{key} = {toml(value)}")


def cmd_serve(args: argparse.Namespace) -> int:
    import signal
    import threading

    from .learner import give_back_large_frees, keep_freed_heap
    from .server import Server, stop_starting

    settings, learner, warm, asked = serve_settings(args)
    if args.print_config:
        print_config(settings, learner)
        return 0
    give_back_large_frees()  # before the state is loaded: its arrays then leave no free heap behind
    keep_freed_heap()  # and the heap's free top kept for the allocations that follow
    stop = threading.Event()
    made = not settings.state_dir.exists()
    serving = False

    def on_signal(signum: int, _frame: object) -> None:
        if not serving:  # compiling, learning the journal again, or a warm start
            stop_starting(signum, settings.state_dir, made)
        log.info("signal %d: checkpointing and stopping", signum)
        stop.set()

    on_signal.safe_while_compiling = True  # type: ignore[attr-defined]  # (it raises nothing: __init__.py)
    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    server = Server(settings, learner, warm, asked)
    serving = True  # (a signal from here on is answered by serve's checkpoint)
    # What exists now (the modules, numba's compiled code, the state just loaded, the pending
    # store's dict) lives as long as the process: out of the garbage collector's sight, a full
    # collection no longer walks it with the loop stopped. Measured with a million requests held:
    # 1.06 s a full collection when they were objects, 0.11 s as tuples, under 1 ms frozen too.
    # Only here: a daemon in a thread of another program (the demo, tests) leaves that program's
    # collector alone.
    gc.freeze()
    server.serve(stop)
    return 0 if server.clean_exit else 1


# -- send and listen ---------------------------------------------------------------------------------
def _stdin_bodies() -> Iterator[tuple[float, Any, str]]:
    for n, line in enumerate(sys.stdin, 1):
        if line.strip():
            try:
                body = json.loads(line.rstrip("\r\n"))  # (without it, an error at the end is put on a line after)
            except json.JSONDecodeError as e:
                raise InputFileError("stdin", n, f"not JSON ({e.msg} at column {e.colno})") from None
            yield 0.0, body, f"stdin:{n}"


def cmd_send(args: argparse.Namespace) -> int:
    import time

    from oddsmill_client import Producer

    from .logs import read_bodies
    from .offline import checked_bodies

    if args.rate < 0:
        raise UsageError(f"--rate must be >= 0, got {args.rate}")
    if args.batch < 1:
        raise UsageError(f"--batch must be >= 1, got {args.batch}")
    if args.wait <= 0:
        raise UsageError(f"--wait must be > 0, got {args.wait}")
    if args.file != "-":
        _check_messages(args.file)
    source = checked_bodies(_stdin_bodies()) if args.file == "-" else read_bodies([args.file])
    # the first body before connecting: stdin that is not a log is said at once, not after --wait
    # seconds without a daemon
    first = next(source, None)
    curve = _client_curve(args)
    t0 = time.monotonic()
    sent = 0
    serve = "oddsmill serve" + (" --ingest-kind pull" if args.kind == "push" else "")

    def nobody(e: TimeoutError) -> OddsmillError:
        """What a probe of the connection found (the client's NoAnswer), or the likeliest causes."""
        from oddsmill_client import sockets

        why = getattr(e, "why", None)
        if why is None:
            return OddsmillError(
                f"no daemon took the stream at {args.to} within {args.wait:g} s (is `{serve}` running with"
                f" --ingest {args.to}? --wait gives it longer)"
            )
        if why == sockets.NOTHING_THERE:  # (a daemon's first start listens once it has compiled)
            why = (
                f"{why} (is `{serve}` running with --ingest {args.to}? Its first start after an install compiles"
                " for up to two minutes before it listens; --wait gives it longer)"
            )
        return OddsmillError(f"no daemon took the stream at {args.to} within {args.wait:g} s: {_curve_hint(why, args)}")

    try:
        producer = Producer(
            args.to,
            kind=args.kind,
            src=args.src,
            batch=args.batch,
            wait_for_daemon=args.wait,
            curve=curve,
            send_timeout=args.wait,
            wait_when_behind=True,  # a file is sent whole: past the high-water marks, wait, never drop
        )
    except ValueError as e:
        raise UsageError(f"--to: {e}") from None
    except TimeoutError as e:
        raise nobody(e) from None
    try:
        with producer as out:
            for _, body, _where in chain([] if first is None else [first], source):
                out.send(body)
                sent += 1
                if args.rate:
                    ahead = sent / args.rate - (time.monotonic() - t0)
                    if ahead > 0:
                        time.sleep(ahead)
    except TimeoutError as e:
        raise nobody(e) from None
    except InputFileError as e:  # (stdin, read as it comes: what came before the bad line is sent)
        before = "the message before it was" if sent == 1 else f"the {sent:,} messages before it were"
        raise InputFileError(e.path, e.line, f"{e.problem}; {before} sent") from None
    print(f"sent {sent:,} events to {args.to} in {time.monotonic() - t0:.1f} s", file=sys.stderr)
    return 0


def _check_messages(name: str) -> None:
    """Read a file whole before `send` sends any of it: a line that is not a message, or one the
    daemon would refuse (a label of 2, a value of NaN), stops it with nothing sent (sent up to that
    line, the file sent again once mended would repeat the lines before it). The pass that sends
    says what the reading logs (a state directory's journal with segments missing), so this one
    keeps quiet."""
    from .logs import read_bodies
    from .offline import checked_bodies

    quiet = logging.getLogger("oddsmill")

    def silent(_record: logging.LogRecord) -> bool:
        return False

    quiet.addFilter(silent)
    try:
        for _ in checked_bodies(read_bodies([name])):
            pass
    finally:
        quiet.removeFilter(silent)


def _curve_hint(why: str, args: argparse.Namespace) -> str:
    """A probe's finding, with the flags that mend it when it is about keys."""
    from oddsmill_client import sockets

    if why == sockets.NEEDS_KEYS and not args.curve_secret:
        return f"{why} (--curve-secret and --curve-server)"
    if why == sockets.WRONG_DAEMON_KEY:
        return f"{why} (--curve-server: the daemon's NAME.key)"
    return why


def _client_curve(args: argparse.Namespace) -> Any:
    """CurveKeys from --curve-secret and --curve-server, or None."""
    from oddsmill_client import CurveKeys

    if bool(args.curve_secret) != bool(args.curve_server):
        raise UsageError("--curve-secret and --curve-server go together")
    if not args.curve_secret:
        return None
    try:
        return CurveKeys.load(args.curve_secret, args.curve_server)
    except (OSError, ValueError) as e:
        raise UsageError(f"cannot read the CURVE keys: {e}") from None


def _client_curve_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--curve-secret", metavar="FILE", help="this client's secret certificate (NAME.key_secret)")
    p.add_argument("--curve-server", metavar="FILE", help="the daemon's public certificate (NAME.key)")


def cmd_keys(args: argparse.Namespace) -> int:
    import zmq.auth

    out = Path(args.dir)
    if not args.name or "/" in args.name or args.name.startswith("."):
        raise UsageError(f"--name must be a plain file name, got {args.name!r}")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UsageError(f"cannot make the directory {out} ({e.strerror})") from None
    public, secret = out / f"{args.name}.key", out / f"{args.name}.key_secret"
    for path in (public, secret):
        if path.exists():
            raise UsageError(f"{path} exists already; not overwriting a key")
    zmq.auth.create_certificates(str(out), args.name)
    secret.chmod(0o600)
    print(f"public key: {public}   (give this one out)")
    print(f"secret key: {secret}   (keep this one; readable by its owner only)")
    return 0


def cmd_listen(args: argparse.Namespace) -> int:
    from oddsmill_client import ScoreSubscriber
    from oddsmill_client.subscriber import decode_columns

    if args.count is not None and args.count < 1:
        raise UsageError(f"--count must be >= 1, got {args.count}")
    if args.timeout is not None and args.timeout <= 0:
        raise UsageError(f"--timeout must be > 0, got {args.timeout}")
    received = 0
    try:
        subscriber = ScoreSubscriber(args.source, curve=_client_curve(args))
    except ValueError as e:
        raise UsageError(f"--from: {e}") from None
    with subscriber as scores:
        while args.count is None or received < args.count:
            try:
                topic, body = scores.receive(timeout=args.timeout)
            except TimeoutError:
                # silence: the end asked for without --count, and short of it with one. Either way a
                # stop with nothing (a wrong address, a daemon not running: a subscriber cannot tell
                # them from a quiet daemon) was silent, and exited 0 with --count unmet
                wanted = "" if args.count is None else f" of {args.count}"
                # nothing at all: the connection may be why (a daemon that requires CURVE, a key it
                # refuses, nothing listening), which ZeroMQ retries without a word
                why = subscriber.why_silent() if received == 0 else None
                print(
                    f"oddsmill listen: {received}{wanted} messages from {args.source},"
                    f" then {args.timeout:g} s of silence" + (f": {_curve_hint(why, args)}" if why else ""),
                    file=sys.stderr,
                )
                return 1 if args.count is not None or why else 0
            received += 1
            if isinstance(body.get("p"), bytes):
                body = decode_columns(body)
            if args.json:
                print(json.dumps({"topic": topic, **body}), flush=True)
            elif topic == "rejects":
                print(f"rejected {body.get('id')!s:>12}  {body['reason']}: {body['detail']}", flush=True)
            elif "batch" in body:
                for s in body["batch"]:
                    print(f"{s['id']!s:>12}  p={s['p']:.4f}  step={s['step']}", flush=True)
            elif isinstance(body.get("p"), list):
                for ident, p in zip(body["id"] or [None] * len(body["p"]), body["p"], strict=True):
                    print(f"{ident!s:>12}  p={p:.4f}  step={body['step']}", flush=True)
            else:
                print(f"{body['id']!s:>12}  p={body['p']:.4f}  step={body['step']}", flush=True)
    return 0


# -- demo ----------------------------------------------------------------------------------------
def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    return run_demo(args)


# -- watching --------------------------------------------------------------------------------------
def cmd_prometheus(args: argparse.Namespace) -> int:
    from importlib import resources

    name = {"rules": "rules.yml", "scrape": "scrape.yml"}[args.what]
    text = (resources.files("oddsmill") / "prometheus" / name).read_text()
    if args.what == "scrape":
        _check_http(args.http)
        text = text.replace('"127.0.0.1:7573"', json.dumps(args.http))
    print(text, end="")
    return 0


def _check_http(http: str) -> None:
    host, _, port = http.rpartition(":")
    if not host or not port.isdigit() or "/" in http:
        raise UsageError(f"--http must be HOST:PORT, got {http!r}")


def cmd_watch(args: argparse.Namespace) -> int:
    from .watch import watch

    _check_http(args.http)
    if not args.interval > 0:
        raise UsageError(f"--interval must be > 0, got {args.interval}")
    try:
        return watch(args.http, args.interval, args.once)
    except KeyboardInterrupt:
        return 0


def cmd_report(args: argparse.Namespace) -> int:
    from .report import report_document, write_html, write_png

    out = Path(args.out)
    if out.suffix.lower() not in (".html", ".htm"):
        raise UsageError(f"--out must name an .html file, got {args.out!r}")
    if not out.parent.is_dir():
        raise UsageError(f"--out {args.out!r}: no such directory {str(out.parent)!r}")
    engine, created, race, _ = load_state(args.state)
    doc = report_document(engine, created, args.state, race)
    try:
        if args.png:
            write_png(doc, out.with_suffix(".png"))  # first: a missing matplotlib writes nothing
        write_html(doc, out)
    except OSError as e:  # (a directory that exists but takes no file: /proc, read-only, full)
        raise UsageError(f"--out {args.out!r}: cannot write ({e.strerror})") from None
    print(f"wrote {out}" + (f" and {out.with_suffix('.png')}" if args.png else ""))
    return 0


def cmd_bench(args: argparse.Namespace) -> int:
    from .bench import bench

    return bench(args)


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="oddsmill", description="An online logistic-regression daemon and its tools.")
    p.add_argument("-v", "--verbose", action="store_true")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    r = sub.add_parser("replay", help="learn offline from logs and write a checkpoint")
    r.add_argument(
        "logs", nargs="+", metavar="LOG", help="JSON Lines (.jsonl, .jsonl.gz), journal segments or state directories"
    )
    r.add_argument("--state", required=True, metavar="DIR", help="a new state directory for the checkpoint")
    r.add_argument("--epochs", type=int, default=1, metavar="N", help="passes over the logs (default 1)")
    r.add_argument("--candidates", metavar="auto", help="race a grid of settings (or [candidates.NAME] in --config)")
    r.add_argument("--json", action="store_true", help="with candidates: the race's table as JSON")
    _learner_options(r)
    r.set_defaults(func=cmd_replay)

    f = sub.add_parser("fit", help="the batch Newton reference fit, with standard errors")
    f.add_argument(
        "logs", nargs="+", metavar="LOG", help="JSON Lines (.jsonl, .jsonl.gz), journal segments or state directories"
    )
    f.add_argument("--json", action="store_true", help="the fit as JSON")
    f.add_argument("--against", metavar="STATE", help="compare a state's coefficients with the optimum")
    _learner_options(f)
    f.set_defaults(func=cmd_fit)

    i = sub.add_parser("inspect", help="show a model: coefficients, odds ratios, settings, metrics")
    i.add_argument(
        "state", metavar="STATE-OR-CHECKPOINT", help="a state directory (its newest checkpoint) or a checkpoint file"
    )
    i.add_argument("--json", action="store_true", help="the model as JSON")
    i.add_argument("--top", type=int, default=None, metavar="K", help="only the K strongest coefficients")
    i.set_defaults(func=cmd_inspect)

    s = sub.add_parser("serve", help="run the daemon: learn from a live stream, publish scores")
    s.add_argument("--state", metavar="DIR", help="checkpoints and journal (default ./state)")
    s.add_argument("--ingest", metavar="ADDR", help="default tcp://127.0.0.1:7571")
    s.add_argument("--ingest-kind", dest="ingest_kind", choices=["sub", "pull"], help="default sub")
    s.add_argument("--scores", metavar="ADDR", help="default tcp://127.0.0.1:7572")
    s.add_argument("--http", metavar="HOST:PORT", help="/metrics, /healthz, /api/status (default 127.0.0.1:7573; off)")
    s.add_argument(
        "--warm-start", dest="warm_start", nargs="+", metavar="LOG", help="a new state learns these logs first"
    )
    s.add_argument(
        "--checkpoint-events",
        dest="checkpoint_events",
        type=int,
        metavar="N",
        help="checkpoint every N (default 1000000)",
    )
    s.add_argument(
        "--checkpoint-seconds",
        dest="checkpoint_seconds",
        type=float,
        metavar="SECONDS",
        help="and at least this often (default 60)",
    )
    s.add_argument(
        "--segment-bytes", dest="segment_bytes", type=int, metavar="BYTES", help="journal segment size (default 64 MiB)"
    )
    s.add_argument(
        "--journal-keep",
        dest="journal_keep",
        type=int,
        metavar="N",
        help="journal segments kept behind the oldest checkpoint (default: all)",
    )
    s.add_argument(
        "--fsync",
        choices=["block", "interval", "os"],
        help="fsync the journal every block, every --fsync-ms (default), or leave it to the OS",
    )
    s.add_argument("--fsync-ms", dest="fsync_ms", type=float, metavar="MS", help="with --fsync interval (default 1000)")
    s.add_argument(
        "--outage-hold-bytes",
        dest="outage_hold_bytes",
        type=int,
        metavar="BYTES",
        help="while the state directory cannot be written, hold this much to learn later (default 256 MiB)",
    )
    s.add_argument(
        "--curve-secret",
        dest="curve_secret",
        metavar="FILE",
        help="the daemon's secret certificate: require CURVE on both sockets (with --curve-clients)",
    )
    s.add_argument(
        "--curve-clients",
        dest="curve_clients",
        metavar="DIR",
        help="directory of the public certificates (*.key) of the clients allowed to connect",
    )
    s.add_argument(
        "--ingest-hwm", dest="ingest_hwm", type=int, metavar="N", help="ingest queue, messages (default 1000)"
    )
    s.add_argument(
        "--scores-hwm",
        dest="scores_hwm",
        type=int,
        metavar="N",
        help="queue per subscriber, messages (default 1000); a subscriber further behind misses scores",
    )
    s.add_argument("--candidates", metavar="auto", help="race a grid of settings (or [candidates.NAME] in --config)")
    s.add_argument(
        "--race-margin", dest="race_margin", type=float, metavar="R", help="relative lead a challenger needs (0.02)"
    )
    s.add_argument(
        "--race-patience", dest="race_patience", type=int, metavar="N", help="labelled events it must hold it (2000)"
    )
    s.add_argument(
        "--block-max", dest="block_max", type=int, metavar="N", help="messages a block at most (default 4096)"
    )
    s.add_argument(
        "--block-bytes", dest="block_bytes", type=int, metavar="BYTES", help="bytes a block at most (default 4 MiB)"
    )
    s.add_argument(
        "--pending-limit", dest="pending_limit", type=int, metavar="N", help="held scoring requests (default 1e6)"
    )
    s.add_argument(
        "--pending-ttl",
        dest="pending_ttl",
        type=float,
        metavar="SECONDS",
        help="how long a request is held (default 7 days)",
    )
    s.add_argument(
        "--allow-insecure-bind",
        dest="allow_insecure_bind",
        action="store_true",
        default=None,
        help="let ZeroMQ sockets bind off loopback without authentication (logged)",
    )
    s.add_argument(
        "--print-config",
        dest="print_config",
        action="store_true",
        help="print the effective configuration as TOML and exit",
    )
    _learner_options(s)
    s.set_defaults(func=cmd_serve)

    se = sub.add_parser("send", help="stream JSON Lines or a journal to a daemon")
    se.add_argument("file", nargs="?", default="-", metavar="FILE", help="a .jsonl(.gz) file, a journal, or - (stdin)")
    se.add_argument(
        "--to", default="tcp://127.0.0.1:7571", metavar="ADDR", help="the daemon's ingest (default %(default)s)"
    )
    se.add_argument("--kind", choices=["pub", "push"], default="pub", help="push for a daemon with --ingest-kind pull")
    se.add_argument("--rate", type=float, default=0.0, help="events a second (0: as fast as possible)")
    se.add_argument("--src", default=None, help="number the messages under this producer name")
    se.add_argument("--batch", type=int, default=1, help="events a message")
    se.add_argument(
        "--wait", type=float, default=10.0, metavar="SECONDS", help="how long to wait for the daemon to take the stream"
    )
    _client_curve_options(se)
    se.set_defaults(func=cmd_send)

    li = sub.add_parser("listen", help="print live scores")
    li.add_argument(
        "--from",
        dest="source",
        default="tcp://127.0.0.1:7572",
        metavar="ADDR",
        help="the daemon's scores (default %(default)s)",
    )
    li.add_argument("--json", action="store_true", help="one JSON object a line")
    li.add_argument("--count", type=int, default=None, help="stop after this many messages")
    li.add_argument("--timeout", type=float, default=None, help="stop after this many seconds of silence")
    _client_curve_options(li)
    li.set_defaults(func=cmd_listen)

    k = sub.add_parser("keys", help="make a CURVE key pair for the daemon or a client")
    k.add_argument("dir", metavar="DIR", help="where to write NAME.key (public) and NAME.key_secret")
    k.add_argument("--name", default="oddsmill", help="the files' name (default oddsmill)")
    k.set_defaults(func=cmd_keys)

    d = sub.add_parser("demo", help="the whole job on the parcel demo data, ending in a summary")
    d.add_argument("--data", help="a demo log other than the bundled one")
    d.add_argument(
        "--keep-running",
        dest="keep_running",
        action="store_true",
        help="leave the daemon up after the summary (Ctrl-C stops it)",
    )
    d.set_defaults(func=cmd_demo)

    w = sub.add_parser("watch", help="the dashboard's figures, live, in a terminal")
    w.add_argument("--http", default="127.0.0.1:7573", metavar="HOST:PORT", help="the daemon's HTTP address")
    w.add_argument("--interval", type=float, default=2.0, metavar="SECONDS", help="between refreshes")
    w.add_argument("--once", action="store_true", help="print one screen and exit (1 if the daemon does not answer)")
    w.set_defaults(func=cmd_watch)

    rp = sub.add_parser("report", help="a checkpoint's dashboard as one self-contained HTML file")
    rp.add_argument(
        "state", metavar="STATE-OR-CHECKPOINT", help="a state directory (its newest checkpoint) or a checkpoint file"
    )
    rp.add_argument("--out", required=True, metavar="FILE.html", help="the page to write")
    rp.add_argument("--png", action="store_true", help="also FILE.png: the log-loss and reliability charts")
    rp.set_defaults(func=cmd_report)

    b = sub.add_parser(
        "bench", help="throughput and latency against the I/O floor (bare and journaled) and a river peer, side by side"
    )
    b.add_argument(
        "--events", type=int, default=20_000, help="events for one-a-message (x5 for batches, x50 for columnar blocks)"
    )
    b.add_argument("--rate", type=float, default=10_000.0, help="offered load for the latency, events/s")
    b.add_argument("--seconds", type=float, default=3.0, help="of latency load, per run (four runs each)")
    b.add_argument("--shapes", default="one,batch,cols", help="any of one, batch, cols, comma-separated")
    b.add_argument("--json", action="store_true", help="the figures as JSON")
    b.set_defaults(func=cmd_bench)

    pm = sub.add_parser("prometheus", help="print an example Prometheus scrape configuration or alert rules")
    pm.add_argument("what", choices=["rules", "scrape"], help="alert rules, or a scrape configuration")
    pm.add_argument("--http", default="127.0.0.1:7573", metavar="HOST:PORT", help="the daemon to scrape")
    pm.set_defaults(func=cmd_prometheus)
    return p


def main(argv: list[str] | None = None) -> int:
    logging.basicConfig(level=logging.INFO, format="oddsmill: %(message)s", stream=sys.stderr)
    try:
        args, extra = build_parser().parse_known_args(argv)
        if extra:  # (argparse's own message names neither the command nor its help)
            raise UsageError(
                f"oddsmill {args.command}: unrecognized arguments: {' '.join(extra)}"
                f" (oddsmill {args.command} --help lists them)"
            )
        return int(args.func(args))
    except (UsageError, ConfigError, InputFileError, CheckpointError, AliasedError, NoOptimumError) as e:
        print(f"oddsmill: {e}", file=sys.stderr)
        return 2
    except OddsmillError as e:
        print(f"oddsmill: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader of stdout went away (`oddsmill inspect STATE | head`): stop quietly, as the
        # Python documentation advises (the signal module's note on SIGPIPE), with stdout pointed
        # at the null device so that the interpreter's flush at exit does not fail once more
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())

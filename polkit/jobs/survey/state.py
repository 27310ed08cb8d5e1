"""The books of a survey folder: ``survey_state.json`` with the mode, the model and the root
seed, and the identities (file hashes) that tell a rerun what changed.

One root :class:`numpy.random.SeedSequence` per survey, recorded on the first run; one child
per position, spawned in manifest order, so a position's result depends neither on the
worker count nor on the order in which the positions finish.
"""

from __future__ import annotations

import json
import logging
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from polkit.errors import ConfigError
from polkit.files import write_json
from polkit.inference.checkpoint import root_seed
from polkit.jobs.survey.layout import STATE_FILE, read_json

__all__ = ["open_state", "priors_key", "sha_or_none"]

log = logging.getLogger(__name__)

_STATE_FORMAT = 1


def open_state(out: Path, mode: str, model: str, seed, priors_key) -> np.random.SeedSequence:
    """Open or create ``survey_state.json``; returns the root seed of this survey.

    Raises
    ------
    ConfigError
        An unreadable state file, or a folder holding a survey with another mode, model
        or seed.
    """
    path = out / STATE_FILE
    old = read_json(path) if path.exists() else None
    if path.exists() and not _readable(old):
        raise ConfigError(
            f"{STATE_FILE} is unreadable; expected the JSON written by run_survey. Fix: "
            "choose a new output folder, or delete the file to start the survey afresh",
            path=path,
            key=STATE_FILE,
        )
    if old is not None:
        return _continue_state(path, old, mode, model, seed, priors_key)
    root = root_seed(seed)
    write_json(path, {
        "format": _STATE_FORMAT,
        "mode": mode,
        "model": model,
        "seed_entropy": str(int(root.entropy)),
        "seed_spawn_key": [int(k) for k in root.spawn_key],
        "priors": priors_key,
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
    })
    return root


def _readable(state) -> bool:
    """True for a state dict as run_survey writes it (its root seed readable)."""
    if not isinstance(state, dict):
        return False
    try:
        int(state["seed_entropy"])
        [int(k) for k in state.get("seed_spawn_key", [])]
    except (TypeError, KeyError, ValueError):
        return False
    return True


def _continue_state(path: Path, old: dict, mode: str, model: str, seed,
                    priors_key) -> np.random.SeedSequence:
    """The recorded root seed of an existing survey, once mode, model and seed agree."""
    for key, value in (("mode", mode), ("model", model)):
        if old.get(key) != value:
            raise ConfigError(
                f"this folder holds a survey with {key} = {old.get(key)!r}; asked for "
                f"{value!r}. Fix: use another output folder for a different {key}",
                path=path,
                key=key,
            )
    entropy = int(old["seed_entropy"])
    spawn_key = tuple(int(k) for k in old.get("seed_spawn_key", []))
    if seed is not None:
        asked = root_seed(seed)
        if (int(asked.entropy), tuple(asked.spawn_key)) != (entropy, spawn_key):
            raise ConfigError(
                f"this folder holds a survey seeded with entropy {entropy}; asked for "
                f"{asked.entropy}. Fix: pass seed=None (or the original seed) to continue "
                "it, or use another output folder",
                path=path,
                key="seed",
            )
    if old.get("priors") != priors_key:
        log.info("survey priors changed since the last run; positions will be refitted")
    state = dict(old, priors=priors_key)
    write_json(path, state)
    return np.random.SeedSequence(entropy, spawn_key=spawn_key)


def sha_or_none(path: Path) -> str | None:
    """SHA-256 of a file's bytes, or ``None`` if it cannot be read."""
    from polkit.files import file_sha256

    try:
        return file_sha256(path)
    except OSError:
        return None


def priors_key(priors) -> Any:
    """The identity of the survey's priors: the dict itself, or a file's path and hash."""
    if priors is None:
        return None
    if isinstance(priors, dict):
        return json.loads(json.dumps(priors, sort_keys=True, default=str))
    p = Path(priors)
    if not p.is_file():
        raise ConfigError("expected a priors file (TOML); found nothing at this path",
                          path=p, key="priors")
    return {"file": str(p.resolve()), "sha256": sha_or_none(p)}

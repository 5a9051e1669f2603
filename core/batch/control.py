"""The control's part of the contrast, prepared once per batch, and its storage.

``OUT_DIR/.prepared-control/`` holds a :class:`core.contrast.PreparedControl`:
``model-<k>.npz`` (each part density through the engine's own ``save()``),
``events.npz`` (the control events, their parts and out-of-part log
densities: plain arrays, read with ``allow_pickle=False``) and
``control.json``, written last (:func:`control_key`: recipe digest, control
path, size and modification time, software version; split settings and the
SHA-256 of every other file).  Save and load sit side by side here with the
format they share.  Imports the density engine and the contrast.
"""

from __future__ import annotations

import json
import os
import zipfile
from typing import Any, Callable

import numpy as np

from .. import RESEARCH_USE_NOTE, __version__
from ..analysis import prepare_control_file
from ..atomic import atomic_write
from ..contrast import PreparedControl
from ..density import AdditiveTreeDensity
from ..errors import ModelFileError
from .layout import CONTROL_DIR
from .markers import sha256_file, source_stamp

CONTROL_META = "control.json"
CONTROL_MODEL = "model-{k}.npz"
CONTROL_ARRAYS = "events.npz"
CONTROL_FORMAT = "boscage-batch-prepared-control"
CONTROL_FORMAT_VERSION = 2


def control_key(control: str, digest: str) -> dict:
    """What a prepared control depends on: recipe digest, the control file (path, size, mtime), software."""
    control = os.path.abspath(os.fspath(control))
    return {"format": CONTROL_FORMAT, "format_version": CONTROL_FORMAT_VERSION,
            "software_version": __version__, "recipe_digest": digest, "control": control,
            "source": source_stamp(control)}


def save_prepared_control(prepared: PreparedControl, folder: str, key: dict) -> None:
    """Write a :class:`core.contrast.PreparedControl` to ``folder`` (created if missing).

    Each part model goes through the engine's own ``save()`` (``model-<k>.npz``);
    the control events, their parts and log densities through ``np.savez``
    (``events.npz``); ``control.json`` (``key``, split settings, checksums) is
    written last, every file atomically, so a folder whose writing was
    interrupted is never taken as valid.
    """
    os.makedirs(folder, exist_ok=True)
    meta_path = os.path.join(folder, CONTROL_META)
    if os.path.exists(meta_path):  # what follows replaces the files it describes
        os.unlink(meta_path)
    names = [CONTROL_MODEL.format(k=k) for k in range(len(prepared.models))]
    for name, model in zip(names, prepared.models):
        model.save(os.path.join(folder, name))
    arrays_path = os.path.join(folder, CONTROL_ARRAYS)
    with atomic_write(arrays_path, "wb", overwrite=True) as fh:
        np.savez(fh, events=np.asarray(prepared.events, dtype=np.float64),
                 part=np.asarray(prepared.part, dtype=np.int64),
                 log_control=np.asarray(prepared.log_control, dtype=np.float64))
    meta = dict(key, n_events=int(prepared.events.shape[0]), n_channels=int(prepared.events.shape[1]),
                folds=int(prepared.folds), random_state=int(prepared.random_state), note=RESEARCH_USE_NOTE,
                sha256={name: sha256_file(os.path.join(folder, name)) for name in names + [CONTROL_ARRAYS]})
    with atomic_write(meta_path, "w", overwrite=True, encoding="utf-8") as fh:
        json.dump(meta, fh, indent=1)


def load_prepared_control(folder: str, key: dict | None = None) -> PreparedControl:
    """Read a prepared control written by :func:`save_prepared_control`.

    With ``key`` (see :func:`control_key`), a control prepared for another
    recipe, control file or software version is refused.  Every problem --
    missing, stale, damaged or hand-edited files -- raises
    :class:`ModelFileError` naming the folder; nothing is unpickled.
    """
    folder = os.fspath(folder)

    def fail(problem: str) -> ModelFileError:
        return ModelFileError(f"prepared control in {folder}: {problem}; run the batch again to rebuild it")

    try:
        with open(os.path.join(folder, CONTROL_META), encoding="utf-8") as fh:
            meta = json.load(fh)
    except FileNotFoundError:
        raise fail("no control.json (not prepared, or its writing was interrupted)") from None
    except (OSError, ValueError) as exc:
        raise fail(f"control.json is damaged or unreadable ({exc})") from exc
    if not isinstance(meta, dict) or meta.get("format") != CONTROL_FORMAT:
        raise fail("control.json is not a prepared control of this program")
    if key is not None:
        changed = [k for k in key if meta.get(k) != key[k]]
        if changed:
            raise fail(f"it was prepared for another {', '.join(changed)}")
    try:
        folds = int(meta["folds"])
        seed = int(meta["random_state"])
    except (KeyError, TypeError, ValueError) as exc:
        raise fail(f"control.json lacks the split settings ({type(exc).__name__}: {exc})") from exc
    if not 2 <= folds <= 100:
        raise fail(f"control.json gives {folds} parts")
    names = [CONTROL_MODEL.format(k=k) for k in range(folds)]
    sums = meta.get("sha256")
    for name in names + [CONTROL_ARRAYS]:
        try:
            digest = sha256_file(os.path.join(folder, name))
        except OSError as exc:
            raise fail(f"{name} cannot be read ({exc.strerror or exc})") from exc
        if not isinstance(sums, dict) or sums.get(name) != digest:
            raise fail(f"{name} does not match its checksum in control.json (damaged or replaced)")
    models = [AdditiveTreeDensity.load(os.path.join(folder, name)) for name in names]
    try:
        with np.load(os.path.join(folder, CONTROL_ARRAYS), allow_pickle=False) as z:
            events = np.asarray(z["events"])
            part = np.asarray(z["part"])
            log_control = np.asarray(z["log_control"])
    except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile) as exc:
        raise fail(f"{CONTROL_ARRAYS} is damaged ({type(exc).__name__}: {exc})") from exc
    n = events.shape[0] if events.ndim == 2 else -1
    if (n <= 0 or events.dtype.kind != "f" or part.shape != (n,) or part.dtype.kind not in "iu"
            or log_control.shape != (n,) or not np.all(np.isfinite(events))
            or np.any((part < 0) | (part >= folds))
            or any(events.shape[1] != int(m.n_features_in_) for m in models)):
        raise fail(f"{CONTROL_ARRAYS} does not hold the control events the models expect "
                   f"(shapes {events.shape}, {part.shape}, {log_control.shape}; {folds} parts)")
    return PreparedControl(models=models, events=events.astype(np.float64), part=part.astype(np.int64),
                           log_control=log_control.astype(np.float64), folds=folds, random_state=seed,
                           source=str(meta.get("control", "")),
                           info={"folder": os.path.abspath(folder), "sha256": dict(sums)})


def ensure_prepared_control(out_dir: str, control: str, recipe: Any, digest: str,
                            force: bool = False, progress: Callable | None = None) -> tuple[str, dict, str]:
    """The batch's prepared control folder, reused when valid, otherwise (re)built.

    Returns ``(folder, key, how)`` with ``how`` "reused", "built" or
    "rebuilt: <reason>".  Raises what preparing the control raises
    (:class:`BoscageError` for an unreadable control or one without the
    recipe's channels).  ``progress(step, total, info)`` goes to the control
    fit; returning False raises :class:`Cancelled`.
    """
    folder = os.path.join(out_dir, CONTROL_DIR)
    key = control_key(control, digest)
    how = "built"
    if os.path.exists(os.path.join(folder, CONTROL_META)):
        if force:
            how = "rebuilt: --force"
        else:
            try:
                load_prepared_control(folder, key)
                return folder, key, "reused"
            except ModelFileError as exc:
                how = f"rebuilt: {exc}"
    prepared = prepare_control_file(control, recipe, progress=progress)
    save_prepared_control(prepared, folder, key)
    return folder, key, how

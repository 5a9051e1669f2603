"""Saving and loading an AdditiveTreeDensity as one ``.npz`` file.

The file holds plain numeric arrays plus ``metadata``: a JSON string with
the format name, the format version, the software version, the
hyper-parameters, the fitted scalars and the research-use note.  It is read
with ``allow_pickle=False``; every array is checked (shapes, index ranges,
tree structure, probabilities in (0, 1), monotone knots) before use so a
damaged or hand-edited file raises :class:`ModelFileError` naming the file
instead of crashing the compiled kernels.

Before anything is inflated the file's structure is checked (:func:`_check_container`):
a regular file, a zip archive (not a single ``.npy`` array), at most
``MAX_MEMBERS`` members with known names, declared sizes within a byte budget
(``MAX_MODEL_BYTES`` in all; inflation never goes beyond a member's declared size)
and, for each array, a ``.npy`` header whose shape fits in the bytes its member
declares.  The metadata JSON's nesting is bounded (:mod:`core.safe_json`).  No
other exception type than ModelFileError leaves :func:`load_model`.
"""

from __future__ import annotations

import json
import os
import stat
import zipfile
import zlib

import numpy as np

from .. import RESEARCH_USE_NOTE, __version__
from .. import safe_json
from ..atomic import atomic_write
from ..write_guard import path_text
from ..errors import ModelFileError
from . import kernels
from .chain import Chain, Layer
from .fitting import FittedDensity
from .marginals import PiecewiseLinearMap
from .mixture_base import BASE_CHOICES, BASES, MIXTURE_BASES, MixtureBase
from .tree import Forest

FORMAT_NAME = "boscage-additive-tree-density"
#: Newest version written/read.  Version 1: logistic base.  Version 2 adds the
#: Gaussian-mixture base (arrays ``gmm_weights``, ``gmm_means``,
#: ``gmm_covariances``, ``gmm_loc``, ``gmm_scale``); models with the logistic
#: base are still written as version 1 so older readers keep reading them.
#: Version 3 adds skewed mixture components (array ``gmm_skew`` (3, K, d):
#: transform centres, scales and skews) and the flat-top background (array
#: ``gmm_background`` (3, d): edges a, b and softness); a mixture without
#: either is still written as version 2, and an older reader refuses a
#: version-3 file rather than scoring it without them.
FORMAT_VERSION = 3
_GMM_ARRAYS = ("gmm_weights", "gmm_means", "gmm_covariances", "gmm_loc", "gmm_scale")

_ARRAYS = ("loc", "scale", "frozen", "bounds", "rot", "has_rot", "m_off", "m_xs", "m_ys", "m_sl",
           "n_marginal_trees", "layer_trees", "roots", "dim", "cut", "lo", "hi", "theta", "left",
           "right", "learning_curve")


def save_model(model, path) -> None:
    """Write ``model`` to ``path`` (.npz) atomically, replacing an existing file."""
    fit = model.fitted_
    chain = fit.chain
    d = fit.n_features
    layers = chain.layers
    L = len(layers)
    rot = np.zeros((L, d, d))
    has_rot = np.zeros(L, np.bool_)
    m_off = np.zeros((L, d + 1), np.int64)
    xs, ys, sl = [], [], []
    forest = Forest()
    layer_trees = [0]
    base = 0
    for i, layer in enumerate(layers):
        rot[i] = np.eye(d) if layer.rotation is None else layer.rotation
        has_rot[i] = layer.rotation is not None
        pwl = layer.marginal
        m_off[i] = pwl.offsets + base
        base += pwl.xs.size
        xs.append(pwl.xs)
        ys.append(pwl.ys)
        sl.append(pwl.slopes)
        forest.append(layer.forest)
        layer_trees.append(forest.n_trees)
    gmm = chain.mixture
    meta = {
        "format": FORMAT_NAME,
        # 3 whenever a version-2 reader would misread it (new arrays, or the "auto" base)
        "format_version": (3 if model.base == "auto" or (gmm is not None and (
            gmm.skew is not None or gmm.background is not None)) else 2 if gmm is not None else 1),
        "software_version": __version__,
        "note": RESEARCH_USE_NOTE,
        "params": model.get_params(),
        "n_features_in": d,
        "n_layers": L,
        "n_trees": int(fit.n_trees),
        "heldout_loglik": float(fit.heldout_loglik),
        "base_heldout_loglik": None if fit.base_heldout_loglik is None else float(fit.base_heldout_loglik),
        "n_events_fitted": int(fit.n_events),
        "stopped_by": fit.stopped_by,
        "base_used": fit.base,
    }
    f = forest
    arrays = dict(loc=chain.loc, scale=chain.scale, frozen=chain.constant, bounds=fit.bounds,
                  rot=rot, has_rot=has_rot, m_off=m_off, m_xs=np.concatenate(xs),
                  m_ys=np.concatenate(ys), m_sl=np.concatenate(sl),
                  n_marginal_trees=fit.n_marginal_trees, layer_trees=np.array(layer_trees, np.int64),
                  roots=f.roots, dim=f.dim, cut=f.cut, lo=f.lo, hi=f.hi, theta=f.theta, left=f.left,
                  right=f.right, learning_curve=fit.learning_curve)
    if gmm is not None:
        arrays.update(gmm_weights=gmm.weights, gmm_means=gmm.means, gmm_covariances=gmm.covariances,
                      gmm_loc=gmm.loc, gmm_scale=gmm.scale)
        if gmm.skew is not None:
            arrays.update(gmm_skew=gmm.skew)
        if gmm.background is not None:
            arrays.update(gmm_background=gmm.background)
    with atomic_write(path, "wb", overwrite=True) as handle:
        np.savez(handle, metadata=np.array(json.dumps(meta)), **arrays)


def _fail(path, problem: str) -> ModelFileError:
    return ModelFileError(f"{os.path.basename(os.fspath(path))}: {problem} (file: {os.fspath(path)})")


#: Byte budget of a model file's inflated contents (real models: well under 100 MB).
MAX_MODEL_BYTES = 1 << 30
#: Most members a model file may hold (it writes about 30).
MAX_MEMBERS = 64
_KNOWN = frozenset(("metadata",) + _ARRAYS + _GMM_ARRAYS + ("gmm_skew", "gmm_background"))


def _check_container(path: str) -> None:
    """Structure and size checks before anything is inflated (ModelFileError naming the file)."""
    try:
        st = os.stat(path)
    except OSError as exc:
        raise _fail(path, f"cannot read the file ({exc.strerror or exc})") from None
    if stat.S_ISDIR(st.st_mode):
        raise _fail(path, "this is a folder, not a density model file")
    if not stat.S_ISREG(st.st_mode):
        raise _fail(path, "not a regular file (a named pipe, device or socket)")
    with open(path, "rb") as fh:
        magic = fh.read(6)
    if magic == b"\x93NUMPY":
        raise _fail(path, "this is a single numpy array (.npy), not a density model file (.npz)")
    if magic[:2] != b"PK":
        raise _fail(path, "not a density model file (not an .npz archive)")
    with zipfile.ZipFile(path) as zf:
        infos = zf.infolist()
        if len(infos) > MAX_MEMBERS:
            raise _fail(path, f"damaged density model file: {len(infos)} members (at most {MAX_MEMBERS})")
        total = 0
        for info in infos:
            name = info.filename[:-4] if info.filename.endswith(".npy") else None
            if name not in _KNOWN:
                raise _fail(path, f"damaged density model file: unexpected member {info.filename[:80]!r}")
            if info.flag_bits & 0x1:
                raise _fail(path, "damaged density model file: encrypted member")
            total += info.file_size
            if info.file_size > MAX_MODEL_BYTES or total > MAX_MODEL_BYTES:
                raise _fail(path, f"damaged or hostile density model file: its members declare "
                                  f"{total:,} bytes, above the {MAX_MODEL_BYTES:,}-byte budget")
            with zf.open(info) as member:
                version = np.lib.format.read_magic(member)
                if version == (1, 0):
                    shape, _fortran, dtype = np.lib.format.read_array_header_1_0(member)
                else:
                    shape, _fortran, dtype = np.lib.format.read_array_header_2_0(member)
            if dtype.hasobject:
                raise _fail(path, f"damaged density model file: {name} holds Python objects")
            count = 1
            for n in shape:
                count *= int(n)
            if count * dtype.itemsize > info.file_size:
                raise _fail(path, f"damaged density model file: {name} declares {count:,} values of "
                                  f"{dtype.itemsize} bytes but its member holds {info.file_size:,} bytes")


def load_model(cls, path):
    """Read a model file written by :func:`save_model` (ModelFileError for anything wrong)."""
    try:
        path = path_text(path)
    except TypeError:
        raise ModelFileError(f"{path!r} is not a file path; give the path of a density model file") from None
    if not os.path.exists(path):
        raise _fail(path, "no such density model file")
    try:
        _check_container(path)
        return _load_checked(cls, path)
    except ModelFileError:
        raise
    except MemoryError:
        raise _fail(path, "not enough memory to read this density model file") from None
    except RecursionError:
        raise _fail(path, "damaged density model file (nested too deeply)") from None
    except (OSError, ValueError, zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, KeyError, TypeError,
            IndexError, OverflowError, NotImplementedError, RuntimeError, UnicodeError, zlib.error) as exc:
        raise _fail(path, f"damaged or unreadable density model file ({type(exc).__name__}: {exc})") from None
    except Exception as exc:  # any other library failure on a damaged file: still our error
        raise _fail(path, f"damaged density model file ({type(exc).__name__}: {exc})") from None


def _reject_constant(name: str):
    raise ValueError(f"{name} is not a number a model file may hold")


def _load_checked(cls, path):
    """:func:`load_model` after the container checks."""
    try:
        with np.load(path, allow_pickle=False) as z:
            files = set(z.files)
            if "metadata" not in files:
                raise _fail(path, "not a density model file (no metadata)")
            meta = safe_json.loads(str(z["metadata"][()]), parse_constant=_reject_constant)
            if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
                raise _fail(path, "not a density model file of this program")
            version = meta.get("format_version")
            if not isinstance(version, int) or version > FORMAT_VERSION:
                raise _fail(path, f"written in model format version {version}, newer than this "
                                  f"program reads ({FORMAT_VERSION}); update the program")
            missing = [k for k in _ARRAYS if k not in files]
            if missing:
                raise _fail(path, f"damaged density model file: missing {', '.join(missing)}")
            a = {k: z[k] for k in _ARRAYS}
            has_gmm = [k in files for k in _GMM_ARRAYS]
            if any(has_gmm) and not all(has_gmm):
                raise _fail(path, "damaged density model file: incomplete Gaussian mixture base")
            if all(has_gmm):
                a.update({k: z[k] for k in _GMM_ARRAYS})
            for key in ("gmm_skew", "gmm_background"):
                if key in files:
                    if not all(has_gmm):
                        raise _fail(path, "damaged density model file: mixture parts without a mixture")
                    a[key] = z[key]
    except ModelFileError:
        raise
    except (OSError, ValueError, zipfile.BadZipFile, EOFError, KeyError, json.JSONDecodeError,
            UnicodeDecodeError) as exc:
        raise _fail(path, f"damaged or unreadable density model file ({exc})") from exc
    try:
        model = _build(cls, meta, a)
    except (ValueError, TypeError, KeyError, IndexError, OverflowError, AttributeError) as exc:
        raise _fail(path, f"damaged density model file ({exc})") from exc
    return model


def _arr(a, key, dtype, shape=None):
    v = np.asarray(a[key])
    if v.dtype.kind not in "biuf":
        raise ValueError(f"{key} is not numeric")
    v = np.ascontiguousarray(v, dtype=dtype)
    if shape is not None and v.shape != shape:
        raise ValueError(f"{key} has shape {v.shape}, expected {shape}")
    return v


def _build(cls, meta, a):
    d = int(meta["n_features_in"])
    if not 1 <= d <= 100_000:
        raise ValueError(f"{d} channels")
    params = dict(meta["params"])
    model = cls(**{k: v for k, v in params.items() if k in cls.param_names()})
    model.validate_params()
    # files written before the base became a parameter used the logistic base;
    # "base_used" (the map "auto" chose) is in files since format 3
    model.base = params.get("base", "logistic")
    base_used = meta.get("base_used", model.base)
    for value, allowed in ((model.base, BASE_CHOICES), (base_used, BASES)):
        if value not in allowed:
            raise ValueError(f"unknown base measure {value!r}")
    loc = _arr(a, "loc", np.float64, (d,))
    scale = _arr(a, "scale", np.float64, (d,))
    frozen = _arr(a, "frozen", np.bool_, (d,))
    bounds = _arr(a, "bounds", np.float64, (2, d))
    if not (np.isfinite(loc).all() and np.isfinite(scale).all() and (scale > 0).all()):
        raise ValueError("invalid channel location/scale")
    L = int(meta["n_layers"])
    if L < 1:
        raise ValueError("no layers")
    rot = _arr(a, "rot", np.float64, (L, d, d))
    has_rot = _arr(a, "has_rot", np.bool_, (L,))
    for i in range(L):
        if not np.allclose(rot[i] @ rot[i].T, np.eye(d), rtol=0, atol=1e-9):
            raise ValueError(f"rotation of layer {i + 1} is not orthogonal")
    m_off = _arr(a, "m_off", np.int64, (L, d + 1))
    m_xs = _arr(a, "m_xs", np.float64)
    m_ys = _arr(a, "m_ys", np.float64, m_xs.shape)
    m_sl = _arr(a, "m_sl", np.float64, m_xs.shape)
    flat = np.append(m_off[:, :-1].ravel(), m_off[-1, -1])
    if flat[0] != 0 or flat[-1] != m_xs.size or (np.diff(flat) < 2).any() \
            or (m_off[1:, 0] != m_off[:-1, -1]).any():
        raise ValueError("inconsistent marginal map offsets")
    for p in range(flat.size - 1):
        xs, ys = m_xs[flat[p]:flat[p + 1]], m_ys[flat[p]:flat[p + 1]]
        if xs[0] != 0 or xs[-1] != 1 or ys[0] != 0 or ys[-1] != 1 or (np.diff(xs) <= 0).any() \
                or (np.diff(ys) < 0).any():
            raise ValueError("a marginal map is not a monotone map of [0, 1]")
    if not (np.isfinite(m_sl).all() and (m_sl > 0).all()):
        raise ValueError("marginal slopes must be positive")
    roots = _arr(a, "roots", np.int64)
    dim = _arr(a, "dim", np.int64)
    m = dim.size
    cut = _arr(a, "cut", np.float64, (m,))
    lo = _arr(a, "lo", np.float64, (m,))
    hi = _arr(a, "hi", np.float64, (m,))
    theta = _arr(a, "theta", np.float64, (m,))
    left = _arr(a, "left", np.int64, (m,))
    right = _arr(a, "right", np.int64, (m,))
    if ((dim < 0) | (dim >= d)).any():
        raise ValueError("split dimension out of range")
    if not ((lo >= 0) & (lo < cut) & (cut < hi) & (hi <= 1)).all():
        raise ValueError("split locations outside their node")
    if not ((theta > 0) & (theta < 1)).all():
        raise ValueError("split probabilities must lie strictly between 0 and 1")
    idx = np.arange(m)
    for child in (left, right):
        if ((child != -1) & ((child <= idx) | (child >= m))).any():
            raise ValueError("tree structure is broken (child index)")
    if ((roots < -1) | (roots >= m)).any():
        raise ValueError("tree root index out of range")
    # each node has exactly one parent or is a root: guarantees finite paths
    refs = np.concatenate([left[left >= 0], right[right >= 0], roots[roots >= 0]])
    if refs.size != m or np.unique(refs).size != m:
        raise ValueError("tree structure is broken (nodes shared or orphaned)")
    forest = Forest(roots, dim, cut, lo, hi, theta, left, right)
    if forest.max_depth() > kernels.MAX_PATH:
        raise ValueError("a tree is deeper than this program supports")
    curve = _arr(a, "learning_curve", np.float64)
    n_trees = int(meta["n_trees"])
    if n_trees != roots.size:
        raise ValueError("tree count does not match the metadata")
    chain = Chain(loc, scale, frozen)
    if base_used in MIXTURE_BASES and not frozen.all():
        if "gmm_weights" not in a:
            raise ValueError("the Gaussian mixture base is missing")
        k_free = int((~frozen).sum())
        means = _arr(a, "gmm_means", np.float64)
        if means.ndim != 2 or means.shape[1] != k_free:
            raise ValueError("Gaussian mixture means do not match the free channels")
        K = means.shape[0]
        chain.mixture = MixtureBase(
            _arr(a, "gmm_weights", np.float64, (K + 1,)), means,
            _arr(a, "gmm_covariances", np.float64, (K, k_free, k_free)),
            _arr(a, "gmm_loc", np.float64, (k_free,)), _arr(a, "gmm_scale", np.float64, (k_free,)),
            skew=_arr(a, "gmm_skew", np.float64, (3, K, k_free)) if "gmm_skew" in a else None,
            background=_arr(a, "gmm_background", np.float64, (3, k_free)) if "gmm_background" in a else None)
    elif "gmm_weights" in a:
        raise ValueError("a Gaussian mixture base is stored but the model does not use one")
    layer_trees = _arr(a, "layer_trees", np.int64, (L + 1,))
    if layer_trees[0] != 0 or layer_trees[-1] != roots.size or (np.diff(layer_trees) < 0).any():
        raise ValueError("inconsistent layer tree counts")
    m_lsl = np.log(m_sl)
    for i in range(L):
        # each layer's own knots (sharing the whole arrays made a loaded model save wrong offsets)
        a0, a1 = int(m_off[i, 0]), int(m_off[i, -1])
        pwl = PiecewiseLinearMap(np.ascontiguousarray(m_off[i] - a0), m_xs[a0:a1], m_ys[a0:a1], m_sl[a0:a1],
                                 m_lsl[a0:a1])
        Q = np.ascontiguousarray(rot[i]) if has_rot[i] else None
        chain.layers.append(Layer(Q, pwl, forest.slice_trees(int(layer_trees[i]), int(layer_trees[i + 1]))))
    base_ll = meta.get("base_heldout_loglik")
    model.fitted_ = FittedDensity(
        chain, base_used, bounds, int(meta.get("n_events_fitted", 0)),
        _arr(a, "n_marginal_trees", np.int64, (d,)), curve, float(meta["heldout_loglik"]),
        None if base_ll is None else float(base_ll), str(meta.get("stopped_by", "")))
    return model

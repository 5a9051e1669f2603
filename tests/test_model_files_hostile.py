"""Bad engine inputs and damaged model files (core/density/model.py entry points, storage.py).

Every bad input raises one of this program's errors, which are also ValueError
(what numpy / scikit-learn users catch for bad values; scikit-learn's
estimator checks raise ValueError for bad X, from memory); scores are finite
for every finite event; a damaged model file never makes the loader inflate
more than the byte budget.
"""

import io
import json
import os
import zipfile

import numpy as np
import pytest

from core.density import AdditiveTreeDensity
from core.density import storage
from core.errors import BoscageError, EventDataError, ModelFileError, ParameterError, RecipeError
from core.recipe import load_recipe

SMALL = {"n_trees": 5, "marginal_trees": 5, "patience": 2, "n_layers": 1, "random_state": 0}


@pytest.fixture(scope="module")
def events():
    return np.random.default_rng(0).normal(size=(300, 3))


@pytest.fixture(scope="module")
def model_file(tmp_path_factory, events):
    path = tmp_path_factory.mktemp("model") / "m.npz"
    AdditiveTreeDensity(base="logistic", **SMALL).fit(events).save(str(path))
    return path


def test_our_value_errors_are_value_errors():
    for cls in (EventDataError, ModelFileError, ParameterError, RecipeError):
        assert issubclass(cls, ValueError) and issubclass(cls, BoscageError)


@pytest.mark.parametrize("scale", [1e160, "mixed"])
def test_fit_of_extreme_magnitudes_raises_our_error(events, scale):
    # finding: values around 1e160 (or x1e200 beside x1e-200) gave a bare ValueError
    X = events.copy()
    if scale == "mixed":
        X[:, 0] *= 1e200
        X[:, 1] *= 1e-200
    else:
        X *= scale
    with pytest.raises(EventDataError, match="column"):
        AdditiveTreeDensity(**SMALL).fit(X)


@pytest.mark.parametrize("base", ["logistic", "gmm", "skewed"])
def test_scores_are_finite_for_every_finite_event_with_a_constant_channel(events, base):
    # finding: with a constant channel, scores were -inf at 1e307
    X = events.copy()
    X[:, 2] = 1.0
    model = AdditiveTreeDensity(base=base, **SMALL).fit(X)
    big = np.finfo(np.float64).max
    probe = np.array([[0, 0, 1e307], [0, 0, -1e307], [1e160, -1e160, 1.0], [big, -big, big], [0, 0, 1.0]])
    scores = model.score_samples(probe)
    assert np.isfinite(scores).all(), scores
    # ordering kept: the ordinary event is far more likely than the extreme ones
    assert scores[-1] > scores[:-1].max()


def test_settings_and_sample_counts_raise_our_errors(events, model_file):
    model = AdditiveTreeDensity.load(str(model_file))
    with pytest.raises(ParameterError):  # finding: sample(-1) raised a bare ValueError
        model.sample(-1)
    with pytest.raises(ParameterError):
        model.sample(2.5)
    assert model.sample(0).shape == (0, 3)
    with pytest.raises(ParameterError):
        AdditiveTreeDensity(learning_rate=2.0).fit(events)
    with pytest.raises(EventDataError):
        AdditiveTreeDensity().fit(np.zeros((100, 0)))
    with pytest.raises(ParameterError):
        AdditiveTreeDensity().set_params(no_such_setting=1)
    with pytest.raises(ParameterError):
        AdditiveTreeDensity(n_trees="many").fit(events)


def _rewrite(src, dst, change):
    """Copy the model archive ``src`` to ``dst`` with ``change(name, bytes) -> bytes`` applied."""
    with zipfile.ZipFile(src) as zin, zipfile.ZipFile(dst, "w") as zout:
        for info in zin.infolist():
            zout.writestr(info.filename, change(info.filename, zin.read(info)))


def _npy(arr):
    buf = io.BytesIO()
    np.save(buf, arr, allow_pickle=False)
    return buf.getvalue()


def test_a_npy_file_is_refused_with_our_error(tmp_path):
    # finding: a .npy file gave TypeError
    p = tmp_path / "m.npz"
    p.write_bytes(_npy(np.arange(5.0)))
    with pytest.raises(ModelFileError, match=r"\.npy"):
        AdditiveTreeDensity.load(str(p))


def test_each_damaged_byte_of_the_zip_directory_gives_our_error(model_file, tmp_path):
    # finding: one damaged byte in the zip directory gave NotImplementedError
    raw = model_file.read_bytes()
    cd = raw.rfind(b"PK\x01\x02")
    start = raw.find(b"PK\x01\x02")
    p = tmp_path / "d.npz"
    positions = range(start, min(len(raw), cd + 46))
    for k, pos in enumerate(positions):
        if k % 7:  # every 7th byte of the directory: fast, and covers every field
            continue
        for value in (0x00, 0xFF, raw[pos] ^ 0x5A):
            bad = bytearray(raw)
            bad[pos] = value
            p.write_bytes(bytes(bad))
            try:
                AdditiveTreeDensity.load(str(p))
            except ModelFileError:
                pass  # a damaged file, named: fine (so is a load the damage did not affect)


def test_deeply_nested_metadata_and_infinite_channel_count_give_our_error(model_file, tmp_path):
    # findings: nested metadata JSON -> RecursionError; n_features_in Infinity -> OverflowError
    meta = json.loads(str(np.load(str(model_file))["metadata"][()]))
    deep = tmp_path / "deep.npz"
    _rewrite(model_file, deep, lambda n, b: _npy(np.array("[" * 200_000 + "]" * 200_000))
             if n == "metadata.npy" else b)
    with pytest.raises(ModelFileError, match="deep.npz"):
        AdditiveTreeDensity.load(str(deep))
    inf = tmp_path / "inf.npz"
    text = json.dumps(dict(meta, n_features_in=1)).replace('"n_features_in": 1', '"n_features_in": Infinity')
    _rewrite(model_file, inf, lambda n, b: _npy(np.array(text)) if n == "metadata.npy" else b)
    with pytest.raises(ModelFileError, match="inf.npz"):
        AdditiveTreeDensity.load(str(inf))


def test_a_member_declaring_huge_sizes_is_refused_before_allocation(model_file, tmp_path):
    # finding: a member declaring 10^12 values raised MemoryError
    huge = tmp_path / "huge.npz"

    def change(name, data):
        if name != "loc.npy":
            return data
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(buf, {"descr": "<f8", "fortran_order": False,
                                                   "shape": (10 ** 12,)})
        return buf.getvalue() + np.zeros(3).tobytes()

    _rewrite(model_file, huge, change)
    with pytest.raises(ModelFileError, match="declares"):
        AdditiveTreeDensity.load(str(huge))


def test_a_zip_bomb_is_refused_by_its_declared_size_before_inflating(model_file, tmp_path):
    # finding: a 1.2 MB file inflated to 1.24 GB and took 6.6 s before its error
    bomb = tmp_path / "bomb.npz"
    n = (storage.MAX_MODEL_BYTES // 8) + 1024
    with zipfile.ZipFile(model_file) as zin, zipfile.ZipFile(bomb, "w", zipfile.ZIP_DEFLATED) as zout:
        for info in zin.infolist():
            if info.filename != "learning_curve.npy":
                zout.writestr(info.filename, zin.read(info))
        with zout.open("learning_curve.npy", "w", force_zip64=True) as fh:
            np.lib.format.write_array_header_1_0(fh, {"descr": "<f8", "fortran_order": False, "shape": (n,)})
            block = bytes(1 << 22)
            left = n * 8
            while left:
                fh.write(block[:min(left, len(block))])
                left -= min(left, len(block))
    assert bomb.stat().st_size < 3_000_000
    with pytest.raises(ModelFileError, match="budget"):  # refused from the declared size: nothing inflated
        AdditiveTreeDensity.load(str(bomb))


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_non_regular_paths_and_wrong_types_give_our_error(tmp_path):
    fifo = tmp_path / "pipe.npz"
    os.mkfifo(fifo)
    with pytest.raises(ModelFileError, match="regular"):
        AdditiveTreeDensity.load(str(fifo))
    with pytest.raises(ModelFileError):
        AdditiveTreeDensity.load(str(tmp_path))
    with pytest.raises(ModelFileError):
        AdditiveTreeDensity.load(12)


def test_deeply_nested_recipe_is_our_error(tmp_path):
    # finding: load_recipe on deeply nested JSON raised RecursionError
    p = tmp_path / "r.json"
    p.write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(RecipeError, match="nested"):
        load_recipe(str(p))


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_a_named_pipe_or_folder_as_recipe_is_our_error(tmp_path):
    fifo = tmp_path / "r.json"
    os.mkfifo(fifo)
    for p in (fifo, tmp_path):
        with pytest.raises(RecipeError, match="regular file"):
            load_recipe(str(p))

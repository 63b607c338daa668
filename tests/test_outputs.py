"""Output folders appear only when complete; results.h5 holds the maps."""

import h5py
import numpy as np
import pytest

from scananalyse.errors import InputError
from scananalyse.outputs import COMPLETE_MARKER, output_folder, write_json, write_results_h5


def test_folder_appears_only_when_complete(tmp_path):
    target = tmp_path / "out"
    with output_folder(target) as tmp:
        (tmp / "a.txt").write_text("1")
        assert not target.exists()
    assert (target / "a.txt").read_text() == "1"
    assert (target / COMPLETE_MARKER).exists()
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def test_failure_leaves_nothing(tmp_path):
    target = tmp_path / "out"
    with pytest.raises(RuntimeError):
        with output_folder(target) as tmp:
            (tmp / "a.txt").write_text("1")
            raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def test_interrupt_leaves_nothing(tmp_path):
    target = tmp_path / "out"
    with pytest.raises(KeyboardInterrupt):
        with output_folder(target) as tmp:
            (tmp / "a.txt").write_text("1")
            raise KeyboardInterrupt
    assert list(tmp_path.iterdir()) == []


def test_existing_folder_needs_force(tmp_path):
    target = tmp_path / "out"
    with output_folder(target) as tmp:
        (tmp / "old.txt").write_text("old")
    with pytest.raises(InputError, match=r"out: output folder exists; use --force"):
        with output_folder(target):
            pass
    assert (target / "old.txt").exists()
    with output_folder(target, force=True) as tmp:
        (tmp / "new.txt").write_text("new")
    assert (target / "new.txt").exists() and not (target / "old.txt").exists()
    # a failed forced run keeps the old complete folder
    with pytest.raises(RuntimeError):
        with output_folder(target, force=True):
            raise RuntimeError("boom")
    assert (target / "new.txt").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_force_refuses_a_folder_it_did_not_write(tmp_path):
    user = tmp_path / "mine"
    user.mkdir()
    (user / "scan.csv").write_text("precious")
    with pytest.raises(InputError, match=r"mine: not replaced: .*no COMPLETE marker"):
        with output_folder(user, force=True):
            pass
    assert (user / "scan.csv").read_text() == "precious"
    # a complete output with a file added by hand is not replaced either
    out = tmp_path / "out"
    with output_folder(out) as tmp:
        (tmp / "a.txt").write_text("1")
    (out / "notes.txt").write_text("mine")
    with pytest.raises(InputError, match=r"holds 'notes.txt', which scananalyse did not write"):
        with output_folder(out, force=True):
            pass
    assert (out / "notes.txt").read_text() == "mine"
    # a forged or old-style marker is not enough
    (user / COMPLETE_MARKER).write_text("complete\n")
    with pytest.raises(InputError, match=r"mine: not replaced"):
        with output_folder(user, force=True):
            pass
    assert (user / "scan.csv").exists()


def test_results_h5_and_json(tmp_path):
    maps = {"loss": np.ones((3, 4), np.float64), "mask": np.zeros((3, 4), bool), "none": None}
    write_results_h5(tmp_path / "r.h5", maps, x0=-5, y0=2, pitch=10, attrs={"tank": "T1"}, timings={"load": 0.5})
    with h5py.File(tmp_path / "r.h5", "r") as f:
        assert f["maps/loss"].dtype == np.float32 and f["maps/mask"].dtype == np.uint8
        assert f["maps"].attrs["pitch_mm"] == 10 and f.attrs["tank"] == "T1"
        assert f["timings"].attrs["load"] == 0.5 and "none" not in f["maps"]
    write_json({"a": float("nan"), "b": [1.0, float("inf")], "c": np.float32(2.5)}, tmp_path / "x.json")
    assert (tmp_path / "x.json").read_text().replace(" ", "").replace("\n", "") == '{"a":null,"b":[1.0,null],"c":2.5}'


@pytest.mark.parametrize("compressor", ["isal", "zlib"])
def test_results_h5_chunks_written_directly_read_back_by_hdf5(tmp_path, monkeypatch, compressor):
    # The maps' chunks are shuffled and deflated by our code and written raw; the HDF5
    # library's own shuffle and deflate filters (through h5py) must decode them to the
    # same values, edge chunks included (grids that are not multiples of the chunk side).
    # Both compressors (ISA-L's, and the zlib module where isal is missing) are checked.
    import zlib

    from scananalyse import outputs
    from scananalyse.outputs import CHUNK

    if compressor == "zlib":
        monkeypatch.setattr(outputs, "_deflater", lambda: ((lambda d: zlib.compress(d, 1)), "zlib"))
    rng = np.random.default_rng(5)
    shape = (CHUNK * 2 + 37, CHUNK + 3)
    t = rng.normal(6.0, 0.4, shape).astype(np.float32)
    t[:40] = np.nan
    maps = {"t": t, "mask": t > 6.1, "ids": rng.integers(-1, 60, shape).astype(np.int32),
            "codes": rng.integers(0, 3, shape).astype(np.int8), "small": t[:5, :7]}
    write_results_h5(tmp_path / "r.h5", maps, x0=0, y0=0, pitch=10)
    with h5py.File(tmp_path / "r.h5", "r") as f:
        for name, want in maps.items():
            d = f["maps"][name]
            assert d.compression == "gzip" and d.shuffle
            want = want.astype(np.uint8) if want.dtype == bool else want
            got = d[()]
            assert got.dtype == want.dtype and got.shape == want.shape
            np.testing.assert_array_equal(got, want)
        # the raw stored chunk is a zlib stream of the byte-shuffled chunk (HDF5's filters)
        raw = f["maps"]["t"].id.read_direct_chunk((0, 0))[1]
        block = t[:CHUNK, :CHUNK]
        assert zlib.decompress(raw) == np.ascontiguousarray(block.view(np.uint8).reshape(-1, 4).T).tobytes()


def test_results_h5_same_array_twice_is_one_dataset_under_two_names(tmp_path):
    # A map passed twice (the same array object) is written once and hard-linked; an
    # equal copy is a dataset of its own.
    a = np.arange(12, dtype=np.float32).reshape(3, 4)
    write_results_h5(tmp_path / "r.h5", {"rate": a, "rate_repaired": a, "copy": a.copy()}, x0=0, y0=0, pitch=10)
    with h5py.File(tmp_path / "r.h5", "r") as f:
        g = f["maps"]
        assert g["rate"].id == g["rate_repaired"].id          # one object, two links
        assert g["copy"].id != g["rate"].id
        for name in ("rate", "rate_repaired", "copy"):
            np.testing.assert_array_equal(g[name][()], a)


def test_interrupt_swallowed_inside_the_block_still_leaves_nothing(tmp_path):
    # Python swallows a KeyboardInterrupt raised in a weak-reference callback or finaliser
    # ("Exception ignored in ..."); the handler also counts the signal, and the folder is
    # not declared complete when one arrived during the block.
    import os
    import signal

    target = tmp_path / "out"
    with pytest.raises(KeyboardInterrupt):
        with output_folder(target) as tmp:
            (tmp / "a.txt").write_text("1")
            try:
                os.kill(os.getpid(), signal.SIGTERM)  # handled: KeyboardInterrupt raised here...
            except KeyboardInterrupt:
                pass  # ...and swallowed, as a finaliser would
    assert list(tmp_path.iterdir()) == []
    # a later, uninterrupted run in the same process is not affected
    with output_folder(target) as tmp:
        (tmp / "b.txt").write_text("2")
    assert (target / "b.txt").exists()


@pytest.mark.parametrize("dtype", [np.float32, np.uint8, np.int16])
def test_band_packing_gives_each_chunks_own_bytes(dtype):
    # results.h5 packs a band of chunks with one transposing copy; each chunk's bytes must be
    # those of the chunk packed alone (padding at the right and bottom edges, a strided input)
    from scananalyse import outputs

    rng = np.random.default_rng(3)
    a = (rng.random((530, 1100)) * 100).astype(dtype)[::2, 1::2]  # 265 x 550, not contiguous
    chunks = (64, 128)
    deflate = outputs._deflater()[0]
    for r0 in range(0, a.shape[0], chunks[0]):
        band = outputs._packed_band(a, r0, chunks, deflate)
        assert len(band) == -(-a.shape[1] // chunks[1])
        for k, data in enumerate(band):
            assert data == outputs._packed_chunk(a, r0, k * chunks[1], chunks, deflate), (r0, k)

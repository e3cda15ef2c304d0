"""The store: one schema, one atomic writer, scan-file and journal checks, completeness and
fingerprint checks for the commands that read a scan.

The scans run on the small random GPT-2-layout checkpoint of tests/small_checkpoint.py.
"""

from __future__ import annotations

import json
import os
import re
import stat
from pathlib import Path

import h5py
import numpy as np
import pytest

from composition.errors import CompositionError
from composition.run.scan import ScanOptions, run_scan
from composition.score.stats import PairStats, summarise
from composition.store import schema
from composition.store.atomic import atomic_write, write_bytes
from composition.store.scanfile import (FORMAT_VERSION, _decode_unit, _encode_unit, apply_unit, check_matches,
                                        journal_path, load_scan, require_complete)
from ..small_checkpoint import plant
from ..small_checkpoint import model, one_thread  # noqa: F401 (module fixtures)

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def scan(model, tmp_path_factory):
    return run_scan(model, tmp_path_factory.mktemp("scan") / "scan.h5")


def test_docs_table_is_the_rendered_schema():
    """The dataset tables of docs/scan-file.md and README.md are the schema rendered (one source of truth).

    Common practice, no source.
    """
    for doc in (ROOT / "docs" / "scan-file.md", ROOT / "README.md"):
        text = doc.read_text()
        inside = text.split("<!-- schema table: begin -->\n")[1].split("<!-- schema table: end -->")[0]
        assert inside == schema.markdown_table(), doc.name


def test_pair_stats_fields_are_declared_in_the_schema():
    """Every value a pair's statistics store is a /pairs dataset of the schema, with its trailing axis.

    Common practice, no source.
    """
    stats = summarise(np.arange(50, dtype=float), 100, (1, 5))
    decl = schema.datasets("pairs")
    for name, value in stats.datasets().items():
        assert name in decl, name
        want = {None: 0, "k": 1, "bins": 1}[decl[name].trailing]
        assert np.ndim(value) == want, name
    assert isinstance(stats, PairStats)


def test_groups_and_references_match_the_schema(model, tmp_path):
    """A scan with a writer group and references holds every dataset of /groups, /group_heads and
    /references with the schema's dtype and shape (G groups, the recorded draws). Common practice, no source."""
    options = ScanOptions(writers="1", responders="2", writer_groups=("pair=0.0+1.1",), references=True,
                          reference_draws=3)
    scan = run_scan(model, tmp_path / "beyond.h5", options)
    L, H, nk = scan.attrs["n_layers"], scan.attrs["n_heads"], len(scan.k)
    with h5py.File(scan.path, "r") as f:
        for d in schema.SCHEMA:
            if d.group in schema.OPTIONAL_GROUPS:
                data = f[d.group][d.name]
                assert data.dtype == np.dtype(d.dtype), (d.group, d.name)
                assert data.shape == d.shape(L, H, nk, scan.attrs["histogram_bins"], 1, 3), (d.group, d.name)
    assert scan.group_names == ["pair"] and scan.groups["group_heads"]["done"].all()


def test_scan_file_groups_match_the_schema_and_tidy_tables_carry_integers_and_intervals(scan):
    """A finished scan holds every schema dataset with the schema's dtype; its tidy tables have
    integer indices, the label strings, and per-k shares with their intervals.

    Common practice, no source.
    """
    with h5py.File(scan.path, "r") as f:
        assert not set(schema.OPTIONAL_GROUPS) & set(f)  # a scan without groups or references has neither
        for d in schema.SCHEMA:
            if d.group not in schema.OPTIONAL_GROUPS:
                assert f[d.group][d.name].dtype == np.dtype(d.dtype), (d.group, d.name)
        assert f.attrs["format_version"] == FORMAT_VERSION and f.attrs["status"] == "complete"
    table = scan.pairs()
    n = int(scan.done.sum())
    for col in ("writer_layer", "writer_head", "responder_layer", "responder_head"):
        assert table[col].dtype.kind == "i" and len(table[col]) == n
    for k in scan.k:
        for name in ("top_share", "bottom_share", "ci_low", "ci_high", "bottom_ci_low", "bottom_ci_high"):
            assert f"{name}_{k}" in table
    i = 5
    w = (table["writer_layer"][i], table["writer_head"][i], table["responder_layer"][i], table["responder_head"][i])
    assert table["writer"][i] == f"{w[0]}.{w[1]}" and table["responder"][i] == f"{w[2]}.{w[3]}"
    assert table["ci_low_1"][i] == scan.arrays["ci_low"][w][0]
    from composition.interpret.heads import load_heads

    heads = load_heads(scan.path).table()
    assert heads["layer"].dtype.kind == "i" and "head_label" in heads and "top_share_5" in heads
    assert heads["done"].all() if "done" in heads else True


def test_finished_scan_file_mode_follows_the_umask(model, tmp_path):
    """A finished scan file is 0644 under umask 022 (0666 less the umask, as any new file).

    Common practice, no source (open(2) creates files with mode & ~umask).
    """
    old = os.umask(0o022)
    try:
        s = run_scan(model, tmp_path / "mode.h5", ScanOptions(writers="0", responders="1"))
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(s.path).st_mode) == 0o644


@pytest.mark.parametrize("kind", ["symlink", "fifo", "directory", "device"])
def test_atomic_writer_refuses_anything_but_a_regular_file(tmp_path, kind):
    """The atomic writer never replaces a symlink, FIFO, directory or device node, and leaves no
    temporary file.

    Common practice, no source.
    """
    target = tmp_path / "out.bin"
    victim = tmp_path / "victim"
    victim.write_bytes(b"keep")
    plant(target, kind, victim)
    with pytest.raises(CompositionError, match="replaces only regular files"):
        write_bytes(target, b"new")
    assert victim.read_bytes() == b"keep"
    assert not list(tmp_path.glob(".*.partial"))


def test_atomic_writer_never_follows_a_symlink_at_the_temporary_path(tmp_path, monkeypatch):
    """A symlink planted at the temporary name makes the write fail; its target is untouched.

    Common practice, no source (O_EXCL | O_NOFOLLOW).
    """
    import composition.store.atomic as atomic

    victim = tmp_path / "victim"
    victim.write_bytes(b"keep")
    planted = tmp_path / ".out.bin.fixed.partial"
    planted.symlink_to(victim)
    monkeypatch.setattr(atomic, "temporary_name", lambda path: planted)
    with pytest.raises(CompositionError, match="cannot write"):
        write_bytes(tmp_path / "out.bin", b"new")
    assert victim.read_bytes() == b"keep"


def test_load_scan_refuses_files_that_are_not_scans(scan, tmp_path):
    """An HDF5 file claiming to be a scan without /pairs, with a wrong dtype or shape, or of an
    unknown version is refused with one sentence.

    Common practice, no source.
    """
    bad = tmp_path / "claims.h5"
    with h5py.File(bad, "w") as f:
        f.attrs["format"] = "composition-scan"
        f.attrs["n_layers"], f.attrs["n_heads"], f.attrs["k"] = 3, 4, [1, 5]
    with pytest.raises(CompositionError, match="no /pairs"):
        load_scan(bad)
    import shutil

    for change, words in ((lambda f: f.attrs.__setitem__("format_version", 99), "format version 99"),
                          (lambda f: (f["pairs"].__delitem__("done"), f["pairs"].create_dataset("done", data=np.zeros(3))),
                           "/pairs/done"),
                          (lambda f: f.attrs.__setitem__("n_heads", 5), "/pairs/top_share")):
        copy = tmp_path / "copy.h5"
        shutil.copyfile(scan.path, copy)
        with h5py.File(copy, "a") as f:
            change(f)
        with pytest.raises(CompositionError, match=re.escape(words)) as info:
            load_scan(copy)
        assert "\n" not in str(info.value)


def test_journal_records_with_nonsense_are_refused():
    """A record that passes its CRC but holds indices outside the arrays, a wrong shape or dtype,
    or an unknown dataset is refused with a sentence, and nothing is written into the arrays.

    Common practice, no source.
    """
    groups = {"pairs": schema.empty("pairs", 2, 2, 1, 4)}
    good = schema.unit_arrays("pairs", 1, 1, 4)
    good["done"][:] = True
    cases = [(np.array([[0, 0, 5, 0]]), good, "outside"),
             (np.array([[0, 0, 1, 0]]), dict(good, top_share=np.zeros((1, 3))), "shape"),
             (np.array([[0, 0, 1, 0]]), dict(good, label=np.zeros(1, dtype="f8")), "type"),
             (np.array([[0, 0, 1, 0]]), dict(good, bogus=np.zeros(1)), "bogus")]
    for index, fields, words in cases:
        group, idx, decoded = _decode_unit(_encode_unit(index, fields), Path("j"))
        with pytest.raises(CompositionError, match=words):
            apply_unit(groups, group, idx, decoded, Path("j"))
        assert not groups["pairs"]["done"].any()


def test_require_complete_and_check_matches(model, tmp_path):
    """An in-progress scan is refused by require_complete and by heads --into; check_matches refuses
    the same weights read under another activation, naming it.

    Common practice, no source.
    """
    from composition.extract import load_weights
    from composition.interpret.heads import add_to_scan

    out = tmp_path / "partial.h5"

    def crash(event):
        if event.kind == "unit":
            raise RuntimeError("stop")

    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=crash)
    partial = load_scan(out)
    with pytest.raises(CompositionError, match="unfinished scan"):
        require_complete(partial, "shortlist")
    w = load_weights(model)
    with pytest.raises(CompositionError, match="unfinished scan"):
        add_to_scan(out, w)
    check_matches(partial, w)
    other = tmp_path / "relu"
    other.mkdir()
    for f in Path(model).iterdir():
        (other / f.name).write_bytes(f.read_bytes())
    config = json.loads((other / "config.json").read_text())
    config["activation_function"] = "relu"
    (other / "config.json").write_text(json.dumps(config))
    with pytest.raises(CompositionError, match="activation changed from gelu-tanh to relu"):
        check_matches(partial, load_weights(other))

"""Reference writers in a scan (docs/groups.md §2, §3): ``--references`` through ``run_scan``, the tidy
table, the terminal findings and the shortlist. Small random GPT-2-layout checkpoints
(tests/small_checkpoint.py, V = 512), a few draws: each scan takes about a second.
"""

from __future__ import annotations

import numpy as np
import pytest

from composition import load_weights
from composition.compose.references import reference_statistics, standing
from composition.extract.tables import TableOptions, token_table
from composition.run.scan import ScanOptions, run_scan

from ..small_checkpoint import one_thread, random_gpt2  # noqa: F401  (one_thread: a fixture)

DRAWS = 7


@pytest.fixture(scope="module")
def scanned(tmp_path_factory):
    root = tmp_path_factory.mktemp("references")
    path, _, _ = random_gpt2(str(root / "m"), seed=0, V=512, d=64, H=4, L=3)
    # fdr 0.5 and no effect threshold: a random model then has labelled pairs and heads to shortlist
    options = ScanOptions(writer_groups=("duo=0.1+1.3",), references=True, reference_draws=DRAWS,
                          reference_seed=4, fdr=0.5, min_effect=0.0)
    return path, run_scan(path, root / "s.h5", options)


def test_stored_references_equal_the_maths_module(scanned):
    """Every responder's identity, unembedding and random-draw statistics in /references equal
    compose.references.reference_statistics (itself checked against dense float64 oracles in
    tests/compose/test_references.py) exactly. Source: docs/groups.md §2."""
    path, scan = scanned
    w = load_weights(path)
    T = token_table(w, TableOptions("attn0-mlp0"))
    ref = scan.groups["references"]
    assert scan.group_attrs["references"]["draws"] == DRAWS and scan.group_attrs["references"]["seed"] == 4
    assert not ref["done"][0].any() and ref["done"][1:].all()  # every responder of the scan; layer 0 is none
    for layer in (1, 2):
        want = reference_statistics(w, T, layer, ks=tuple(scan.k), draws=DRAWS, seed=4)
        for h in range(4):
            for kind in ("identity", "unembedding"):
                s = want[kind][h]
                assert ref[f"{kind}_mean_percentile"][layer, h] == s.mean_percentile
                np.testing.assert_array_equal(ref[f"{kind}_top_share"][layer, h], s.top_share)
                np.testing.assert_array_equal(ref[f"{kind}_bottom_share"][layer, h], s.bottom_share)
                assert ref[f"{kind}_p_value"][layer, h] == s.p_value
            np.testing.assert_array_equal(ref["random_mean_percentile"][layer, h],
                                          [d[h].mean_percentile for d in want["random"]])


def test_tidy_tables_carry_each_pairs_standing(scanned):
    """Scan.pairs() and Scan.group_pairs() compute above_identity, above_unembedding, random_z, outside_band
    and above_generic on read with compose.references.standing from the stored references; checked here
    against numpy on the raw arrays for every pair. Source: docs/groups.md §3 (the definitions)."""
    _, scan = scanned
    ref = scan.groups["references"]
    for table in (scan.pairs(), scan.group_pairs()):
        lR, hR = table["responder_layer"], table["responder_head"]
        pair = table["mean_percentile"]
        draws = ref["random_mean_percentile"][lR, hR]  # [P, draws]
        np.testing.assert_array_equal(table["above_identity"], pair - ref["identity_mean_percentile"][lR, hR])
        np.testing.assert_allclose(table["random_z"], (pair - draws.mean(1)) / draws.std(1, ddof=1), rtol=1e-12)
        lo, hi = np.quantile(draws, (0.05, 0.95), axis=1, method="weibull")
        np.testing.assert_array_equal(table["outside_band"], np.where(pair > hi, 1, np.where(pair < lo, -1, 0)))
        want = standing(pair, ref["identity_mean_percentile"][lR, hR], ref["unembedding_mean_percentile"][lR, hR],
                        draws)
        np.testing.assert_array_equal(table["above_generic"], want["above_generic"])


def test_findings_and_shortlist_show_the_standing_column(scanned):
    """The terminal findings gain an ``above generic`` column, and the shortlist ranks each candidate's
    writers by |above_generic| and shows it beside random z. Common practice, no source."""
    from composition.interpret.predict import shortlist
    from composition.present import terminal
    from composition.present.report import load_report_inputs

    _, scan = scanned
    assert "above generic" in terminal.findings(scan)[2]
    scan_data, head_data = load_report_inputs(scan.path)
    candidates = shortlist(scan_data, head_data)
    assert candidates
    for c in candidates:
        values = [abs(r["above_generic"]) for r in c.writers]
        assert values == sorted(values, reverse=True)
        assert c.strength == pytest.approx(min(abs(c.ov_mean_percentile - 0.5), values[0]))
    lines = terminal.shortlist(candidates, scan_data)
    assert "above generic" in lines[1] and "random z" in lines[1]
    first = candidates[0].writers[0]
    assert f"{first['above_generic']:+13.3f}" in lines[2]


def test_references_need_the_query_side_full_write():
    """The references are query-side writes: other sides, parts or the column orientation are refused with
    a sentence naming --references. Common practice, no source."""
    from composition.errors import CompositionError

    with pytest.raises(CompositionError, match="--references compares pairs of the query side"):
        ScanOptions(references=True, side="key").validate()
    with pytest.raises(CompositionError, match="--reference-draws"):
        ScanOptions(references=True, reference_draws=1).validate()


def test_report_has_writer_groups_and_reference_sections(scanned, tmp_path):
    """The report of a scan with a group and references has the "Writer groups" and "Reference writers"
    sections, the group's rows, and their CSV files. Common practice, no source."""
    from composition.present.report import write_report

    _, scan = scanned
    html = write_report(scan.path, tmp_path / "report", svg=False).read_text()
    assert '<h2 id="writer-groups">Writer groups</h2>' in html and '<h2 id="references">Reference writers</h2>' in html
    assert "0.1+1.3" in html
    rows = (tmp_path / "report" / "tables" / "group_pairs.csv").read_text().splitlines()
    assert len(rows) == 1 + int(scan.groups["groups"]["done"].sum()) and "duo" in rows[1]
    assert (tmp_path / "report" / "tables" / "references.csv").exists()

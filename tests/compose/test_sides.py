"""Key side, value side and the query side's mediation parts (docs/methods.md §3b).

Dense float64 oracles (tests/oracles/dense_sides.py, written from docs/methods.md) on small random
GPT-2-layout checkpoints written in the test; scale invariances; the projection identity;
and recovery of what was planted in the invented demo model.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from composition import CompositionError, load_weights
from composition.compose import sides
from composition.present.cli import main
from composition.compose.factors import (key_middles, key_side, query_middles, query_part_side,
                                 responder_keys, responder_queries, responder_readouts, unembed_coefficients,
                                 unembed_directions, unembed_queries, value_middles, value_side, write_fraction,
                                 writer_values)
from composition.score.ranks import diagonal_midranks
from composition.run.scan import ScanOptions, run_scan
from composition.score.stats import summarise
from composition.extract.tables import TableOptions, token_table
from ..oracles import dense_gpt2 as og
from ..small_checkpoint import random_numpy_sd
from ..oracles import dense_sides as osd

CFG = dict(model_type="gpt2", n_embd=64, n_head=4, n_layer=3, vocab_size=300, n_positions=32,
           layer_norm_epsilon=1e-5, activation_function="gelu_new", n_inner=None)
PAIRS = [((0, 1), (1, 2)), ((0, 3), (2, 0)), ((1, 2), (2, 3))]


def _random_sd(cfg, seed, untied):
    """A random GPT-2-layout state dict (float32) with non-trivial biases and norms."""
    return random_numpy_sd(cfg, seed, prefix="transformer.", qkv_bias_std=0.3, untied=untied)


class Small:
    """A small random checkpoint on disk, its canonical weights and both token tables."""

    def __init__(self, directory, untied):
        from safetensors.numpy import save_file

        directory.mkdir(parents=True, exist_ok=True)
        sd = _random_sd(CFG, seed=11 if untied else 12, untied=untied)
        save_file(sd, str(directory / "model.safetensors"))
        (directory / "config.json").write_text(json.dumps(CFG))
        self.dir, self.sd = directory, sd
        self.w = load_weights(directory)
        self.T = token_table(self.w, TableOptions("attn0-mlp0"))  # [V, d] ours
        self.T_oracle = og.token_table(sd, CFG, "attn0-mlp0", None)  # [V, d] oracle's own
        self.scale = og.attn_scale(CFG, 1)


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """Untied unembedding, so that a mix-up of W_U and W_E would show."""
    return Small(tmp_path_factory.mktemp("small-untied"), untied=True)


@pytest.fixture(scope="module")
def small_tied(tmp_path_factory):
    return Small(tmp_path_factory.mktemp("small-tied"), untied=False)


def _factors(m: Small, writer, responder, side, part="full", orientation="row"):
    """The analyzer's factor pair for one pair, built from the public factor functions (the side
    registry refuses what a side does not offer, as the command line does)."""
    (lU, hU), (lR, hR) = writer, responder
    sides.get(side, part, orientation)
    A = writer_values(m.w, m.T, lU)[hU]  # [V, dh]
    if side == "key":
        return key_side(A, key_middles(m.w, lU, hU, lR)[hR], responder_queries(m.w, m.T, lR)[hR], orientation)
    if side == "value":
        return value_side(A, value_middles(m.w, lU, hU, lR)[hR], responder_readouts(m.w, lR)[hR])
    C, K = query_middles(m.w, lU, hU, lR)[hR], responder_keys(m.w, m.T, lR)[hR]
    U = unembed_directions(m.w, lU)  # [V, d]
    alpha = unembed_coefficients(A, m.w.layers[lU].attn.W_O[hU], U)  # [V]
    return query_part_side(A, C, K, part, alpha, unembed_queries(m.w, U, lU, lR)[hR], orientation)


def _oracle(m: Small, writer, responder, side, part="full"):
    """The oracle's dense matrix, row orientation (rows: query tokens for the key side)."""
    if side == "key":
        return osd.dense_key_matrix(m.sd, CFG, m.T_oracle, writer, responder)
    if side == "value":
        return osd.dense_value_matrix(m.sd, CFG, m.T_oracle, writer, responder)
    return osd.dense_query_part_matrix(m.sd, CFG, m.T_oracle, writer, responder, part)


def _close(a, b, rtol=1e-9):
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    assert np.max(np.abs(a - b)) <= rtol * np.max(np.abs(b))


CASES = [("key", "full"), ("value", "full"), ("query", "full"), ("query", "unembed"), ("query", "rest")]


# ---------------------------------------------------------------------------
# dense oracles: every row's (or column's) midrank exact
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("tied", [False, True])
@pytest.mark.parametrize("side,part", CASES)
def test_factors_equal_dense_oracle_and_midranks_exact(small, small_tied, side, part, tied):
    """For each side and each query part, on a small random GPT-2-layout checkpoint (tied and
    untied unembedding): the analyzer's factors multiply to the oracle's dense float64 matrix,
    and the exact midrank kernel gives every row's diagonal midrank (and, where the side offers
    it, every column's) exactly as scipy.stats.rankdata on the dense matrix.

    Reference library: scipy.stats.rankdata (via tests/oracles/dense_gpt2.midranks_rows);
    Source: docs/methods.md §3, §3b, §4 (the oracle's formulas)"""
    small = small_tied if tied else small
    orientations = ("row",) if side == "value" else ("row", "column")
    for writer, responder in PAIRS:
        S = _oracle(small, writer, responder, side, part)  # [V, V]
        left, right = _factors(small, writer, responder, side, part)
        _close((left @ right.T).numpy() * (1.0 if side == "value" else small.scale), S)
        for orientation in orientations:
            left, right = _factors(small, writer, responder, side, part, orientation)
            ours = diagonal_midranks(left, right).numpy()
            ref = og.midranks_rows(S) if orientation == "row" else og.midranks_columns(S)
            np.testing.assert_array_equal(ours, ref)


def test_key_side_query_bias_counts_and_key_bias_does_not(small):
    """The key side's rows are query tokens ``j`` with the full token-table query
    ``N_lR(T[j]) W_Q + b_Q``: shifting the responder's query bias changes row ranks (it varies
    along a row), and the analyzer's ranks still equal scipy's on the oracle's matrix with the same
    shift; shifting its key bias changes nothing (the written-token key is the writer's linear
    contribution, and ``q . b_K`` is constant over keys).

    Reference library: scipy.stats.rankdata; Source: docs/methods.md §3b (key side), §3 (key bias)"""
    import dataclasses

    writer, responder = PAIRS[0]
    (lR, hR), d, dh = responder, CFG["n_embd"], CFG["n_embd"] // CFG["n_head"]
    base = diagonal_midranks(*_factors(small, writer, responder, "key")).numpy()
    name = f"transformer.h.{lR}.attn.c_attn.bias"
    for block, field in ((0, "b_Q"), (1, "b_K")):
        sd = dict(small.sd)
        bias = sd[name].copy()
        bias[block * d + hR * dh:block * d + (hR + 1) * dh] += 3.0
        sd[name] = bias
        attn = small.w.layers[lR].attn
        shifted = getattr(attn, field).clone()
        shifted[hR] += 3.0
        layers = list(small.w.layers)
        layers[lR] = dataclasses.replace(layers[lR], attn=dataclasses.replace(attn, **{field: shifted}))
        m = Small.__new__(Small)
        m.__dict__.update(small.__dict__, w=dataclasses.replace(small.w, layers=tuple(layers)))
        ours = diagonal_midranks(*_factors(m, writer, responder, "key")).numpy()
        ref = og.midranks_rows(osd.dense_key_matrix(sd, CFG, small.T_oracle, writer, responder))
        np.testing.assert_array_equal(ours, ref)
        assert np.array_equal(ours, base) == (field == "b_K")


def test_value_side_refuses_column_orientation(small):
    """The value side is row orientation only (docs/methods.md §3b): asking for columns is a plain error.

    Common practice, no source"""
    writer, responder = PAIRS[0]
    with pytest.raises(CompositionError, match="--side value"):
        _factors(small, writer, responder, "value", orientation="column")
    with pytest.raises(CompositionError, match="--side value"):
        ScanOptions(side="value", orientation="column").validate()
    with pytest.raises(CompositionError, match="--query-part"):
        ScanOptions(side="key", query_part="unembed").validate()


def test_write_fraction_matches_oracle_and_parts_sum_to_one(small):
    """The write fraction of each part (mean over tokens of |o_part(t)|^2 / |o_U(t)|^2) equals the
    oracle's residual-space computation; unembed + rest = 1 token by token, so their means sum to 1.

    Source: docs/methods.md §3b (write fraction; Pythagoras for an orthogonal projection)"""
    for writer, _ in PAIRS:
        (lU, hU) = writer
        A = writer_values(small.w, small.T, lU)[hU]
        W_O = small.w.layers[lU].attn.W_O[hU]
        alpha = unembed_coefficients(A, W_O, unembed_directions(small.w, lU))
        got = {p: write_fraction(A, W_O, p, alpha) for p in ("full", "unembed", "rest")}
        assert got["full"] == 1.0
        for p in ("unembed", "rest"):
            assert got[p] == pytest.approx(osd.write_fraction(small.sd, CFG, small.T_oracle, writer, p), rel=1e-9)
        assert got["unembed"] + got["rest"] == pytest.approx(1.0, abs=1e-12)
        assert 0.0 < got["unembed"] < 0.5  # a random write is mostly off its token's direction


# ---------------------------------------------------------------------------
# the projection identity
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("orientation", ["row", "column"])
def test_projection_identity_full_is_unembed_plus_rest(small, orientation):
    """full = unembed + rest on the factors: the written-token factors of the two parts add up
    to the full one to float tolerance, and the fixed factor is shared; the unembed part is rank
    dh (rows of one [V, dh] matrix scaled by signed per-token numbers).

    Source: docs/methods.md §3b (o_U(t) = its projection on u_t + the remainder)"""
    written = 0 if orientation == "row" else 1
    for writer, responder in PAIRS:
        full = _factors(small, writer, responder, "query", "full", orientation)
        une = _factors(small, writer, responder, "query", "unembed", orientation)
        rest = _factors(small, writer, responder, "query", "rest", orientation)
        assert full[0].shape == une[0].shape == rest[0].shape == (CFG["vocab_size"], CFG["n_embd"] // CFG["n_head"])
        _close(une[written] + rest[written], full[written], rtol=1e-12)
        assert torch.equal(une[1 - written], full[1 - written]) and torch.equal(rest[1 - written], full[1 - written])
        # and on the dense oracle: S_full = S_unembed + S_rest
        S = [_oracle(small, writer, responder, "query", p) for p in ("full", "unembed", "rest")]
        _close(S[1] + S[2], S[0], rtol=1e-12)


# ---------------------------------------------------------------------------
# scale invariance
# ---------------------------------------------------------------------------

def test_key_side_columns_are_free_of_key_scales(small):
    """Multiplying each written token's key by a random positive factor leaves every column rank
    of the key side unchanged (column orientation: a written token across query tokens), and the
    ranks still equal scipy's on the rescaled dense matrix; the row orientation, by contrast, does
    depend on those scales (the common-scale assumption is a real assumption).

    Reference library: scipy.stats.rankdata; Source: docs/methods.md §3b"""
    rng = np.random.default_rng(0)
    for writer, responder in PAIRS:
        keys, queries = _factors(small, writer, responder, "key", orientation="column")  # written, query
        c = torch.tensor(rng.uniform(0.05, 20.0, CFG["vocab_size"]))  # [V] > 0
        base = diagonal_midranks(keys, queries).numpy()
        scaled = diagonal_midranks(keys * c[:, None], queries).numpy()
        np.testing.assert_array_equal(scaled, base)
        S = _oracle(small, writer, responder, "key") * c.numpy()[None, :]  # column t scaled by c_t
        np.testing.assert_array_equal(scaled, og.midranks_columns(S))
        row_base = diagonal_midranks(queries, keys).numpy()
        row_scaled = diagonal_midranks(queries, keys * c[:, None]).numpy()
        assert not np.array_equal(row_scaled, row_base)


@pytest.mark.parametrize("side,part", [("query", "full"), ("query", "unembed"), ("query", "rest"), ("value", "full")])
def test_row_ranks_free_of_written_token_scales(small, side, part):
    """Multiplying each row of the query and value sides' written-token factor by a random positive
    factor leaves every row rank unchanged, equal to scipy's on the rescaled dense matrix.

    Reference library: scipy.stats.rankdata; Source: docs/methods.md §3, §3b"""
    rng = np.random.default_rng(1)
    for writer, responder in PAIRS:
        left, right = _factors(small, writer, responder, side, part)
        c = torch.tensor(rng.uniform(0.05, 20.0, CFG["vocab_size"]))  # [V] > 0
        scaled = diagonal_midranks(left * c[:, None], right).numpy()
        np.testing.assert_array_equal(scaled, diagonal_midranks(left, right).numpy())
        S = _oracle(small, writer, responder, side, part) * c.numpy()[:, None]
        np.testing.assert_array_equal(scaled, og.midranks_rows(S))


def test_key_rotation_argument_matches_dense_score(small):
    """An averaged rotary matrix ``M`` passed to key_middles is folded so that the key side equals
    the dense score ``q M k^T`` (docs/methods.md §3, row-vector form), here with a random ``M``.

    Source: docs/methods.md §3 (rotary folding)"""
    writer, responder = PAIRS[1]
    (lU, hU), (lR, hR) = writer, responder
    dh = CFG["n_embd"] // CFG["n_head"]
    M = np.random.default_rng(2).normal(size=(dh, dh))
    A = writer_values(small.w, small.T, lU)[hU]
    left, right = key_side(A, key_middles(small.w, lU, hU, lR, rotation=torch.tensor(M))[hR],
                           responder_queries(small.w, small.T, lR)[hR])
    S = osd.dense_key_matrix(small.sd, CFG, small.T_oracle, writer, responder, rotation=M)
    _close((left @ right.T).numpy() * small.scale, S)
    np.testing.assert_array_equal(diagonal_midranks(left, right).numpy(), og.midranks_rows(S))


# ---------------------------------------------------------------------------
# the scan: dispatch, scan file, CLI
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("side,part,orientation", [("key", "full", "row"), ("key", "full", "column"),
                                                   ("value", "full", "row"), ("query", "unembed", "row"),
                                                   ("query", "rest", "column")])
def test_scan_dispatch_matches_oracle(small, tmp_path, side, part, orientation):
    """A scan with --side/--query-part stores, per pair, the statistics of the oracle's midranks,
    records side and query part in the file, and stores the write fraction beside the shares.

    Reference library: scipy.stats.rankdata; Source: docs/methods.md §3b, §4"""
    options = ScanOptions(table="attn0-mlp0", side=side, query_part=part, orientation=orientation,
                          writers="0.1,1.2", responders="2")
    scan = run_scan(small.dir, tmp_path / "s.h5", options)
    assert scan.attrs["side"] == side and scan.attrs["query_part"] == part
    assert json.loads(scan.attrs["options"])["side"] == side
    for writer in ((0, 1), (1, 2)):
        frac = 1.0 if part == "full" else osd.write_fraction(small.sd, CFG, small.T_oracle, writer, part)
        for hR in range(CFG["n_head"]):
            S = _oracle(small, writer, (2, hR), side, part)
            ref = summarise(og.midranks_rows(S) if orientation == "row" else og.midranks_columns(S), 300)
            ix = writer + (2, hR)
            assert scan.done[ix]
            np.testing.assert_array_equal(scan.top_share[ix], ref.top_share)
            np.testing.assert_array_equal(scan.bottom_share[ix], ref.bottom_share)
            assert scan.mean_percentile[ix] == ref.mean_percentile
            assert scan.write_fraction[ix] == pytest.approx(frac, rel=1e-9)
    assert np.isnan(scan.write_fraction[0, 0, 2, 0])  # not computed


def test_scan_fingerprint_depends_on_side_and_part(small, tmp_path):
    """Scans of the same weights with different sides or parts get different fingerprints, so
    their files are never mistaken for one another. Common practice, no source"""
    fps = set()
    for side, part in (("query", "full"), ("query", "unembed"), ("key", "full")):
        scan = run_scan(small.dir, tmp_path / f"{side}-{part}.h5",
                        ScanOptions(side=side, query_part=part, writers="1.0", responders="2.0"))
        fps.add(scan.attrs["fingerprint"])
        assert scan.attrs["weights_fingerprint"] == small.w.fingerprint()
    assert len(fps) == 3


@pytest.mark.parametrize("side,part", [("key", "full"), ("query", "unembed"), ("query", "rest"), ("value", "full")])
def test_rotary_offsets_fold_into_every_side(small, tmp_path, side, part):
    """On a model with rotary positions, a scan with --rotary-offsets folds the same averaged
    rotation ``M`` (composition.extract.rotary.mean_rotation, itself checked against transformers) into the
    key side (``q M k^T`` with the written token's key) and into both query parts, so the stored
    statistics are those of the oracle's dense matrices with ``M``; the value side has no positions
    in it and does not change.

    Reference library: scipy.stats.rankdata; Source: docs/methods.md §3 (rotary folding), §3b"""
    import dataclasses

    from composition.extract.rotary import inverse_frequencies, mean_rotation
    from composition.extract.weights import Rotary

    dh = CFG["n_embd"] // CFG["n_head"]
    w = dataclasses.replace(small.w, rotary=Rotary(dh, "split-half", inverse_frequencies(dh, 10000.0)))
    M = mean_rotation(w.rotary, dh, 0, 7).numpy()  # [dh, dh]
    assert not np.allclose(M, np.eye(dh))
    writer, responders = (0, 1), "2"
    scans = {off: run_scan(w, tmp_path / f"{off}.h5", ScanOptions(side=side, query_part=part, writers="0.1",
                                                                   responders=responders, rotary_offsets=off))
             for off in ((0, 0), (0, 7))}
    for hR in range(CFG["n_head"]):
        if side == "key":
            S = osd.dense_key_matrix(small.sd, CFG, small.T_oracle, writer, (2, hR), rotation=M)
        elif side == "query":
            S = osd.dense_query_part_matrix(small.sd, CFG, small.T_oracle, writer, (2, hR), part, rotation=M)
        else:
            S = osd.dense_value_matrix(small.sd, CFG, small.T_oracle, writer, (2, hR))
        ref = summarise(og.midranks_rows(S), 300)
        ix = writer + (2, hR)
        assert scans[(0, 7)].mean_percentile[ix] == ref.mean_percentile
        np.testing.assert_array_equal(scans[(0, 7)].top_share[ix], ref.top_share)
    rotated, plain = (scans[o].mean_percentile[0, 1, 2] for o in ((0, 7), (0, 0)))
    assert np.array_equal(rotated, plain) == (side == "value")


def test_cli_side_options(small, tmp_path):
    """`composition scan --side key` writes a key-side scan file; a contradictory option pair is one
    line on stderr with exit status 2, no traceback. Common practice, no source"""
    runner = CliRunner()
    out = tmp_path / "k.h5"
    res = runner.invoke(main, ["scan", str(small.dir), "-o", str(out), "--side", "key", "--orientation", "column",
                               "--writers", "0.1", "--responders", "1", "-q"])
    assert res.exit_code == 0, res.output
    assert "side key" in res.output
    from composition import load_scan

    assert load_scan(out).attrs["side"] == "key" and load_scan(out).attrs["orientation"] == "column"
    for args in (["--side", "value", "--orientation", "column"], ["--side", "key", "--query-part", "rest"]):
        res = runner.invoke(main, ["scan", str(small.dir), "-o", str(tmp_path / "x.h5"), *args, "-q"])
        assert res.exit_code == 2
        assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr


# ---------------------------------------------------------------------------
# the demo: recovery of what was planted
# ---------------------------------------------------------------------------

DEMO_WRITERS, DEMO_RESPONDERS = "1.1,1.3", "2"  # the side circuits' writers against layer 2


@pytest.fixture(scope="module")
def demo_scans(tmp_path_factory):
    """Restricted scans of the invented demo model, one per side and query part."""
    from composition.demo import build_demo

    root = tmp_path_factory.mktemp("demo")
    w = load_weights(build_demo(root / "model"))
    runs = {("query", "full"): DEMO_WRITERS, ("query", "unembed"): DEMO_WRITERS, ("query", "rest"): DEMO_WRITERS,
            ("key", "full"): DEMO_WRITERS, ("value", "full"): "1.1"}
    return {(side, part): run_scan(w, root / f"{side}-{part}.h5",
                                   ScanOptions(side=side, query_part=part, writers=writers, responders=DEMO_RESPONDERS))
            for (side, part), writers in runs.items()}


def _labelled(scan) -> dict:
    lab = scan.label
    return {((int(a), int(b)), (int(c), int(e))): int(lab[a, b, c, e])
            for a, b, c, e in np.argwhere((lab == 1) | (lab == -1))}


def _selected(expected: dict, writers: str) -> dict:
    heads = {tuple(int(x) for x in h.split(".")) for h in writers.split(",")}
    return {pair: v for pair, v in expected.items() if pair[0] in heads and pair[1][0] == 2}


def test_demo_key_side_finds_the_induction_like_pair(demo_scans):
    """Recovery of what was planted in the invented demo model: the previous-token-like writer 1.1
    (moves the token's block-A component into block B) and the induction-like responder 2.0 (queries
    with the token's own block A, keys on block B) are labelled attention-raising by the key side and
    neutral by the query side; the key side labels exactly the planted key-side pairs of the selection.

    Source: recovery of what was planted (composition.demo.SIDE_CIRCUITS, PLANTED_KEY_PAIRS)"""
    from composition.demo import PLANTED_KEY_PAIRS, PLANTED_PAIRS

    key, query = demo_scans[("key", "full")], demo_scans[("query", "full")]
    assert key.attrs["side"] == "key"
    assert key.label[1, 1, 2, 0] == +1 and query.label[1, 1, 2, 0] == 0
    assert key.top_share[1, 1, 2, 0][-1] > 0.9
    assert _labelled(key) == _selected(PLANTED_KEY_PAIRS, DEMO_WRITERS)
    assert _labelled(query) == _selected(PLANTED_PAIRS, DEMO_WRITERS)


def test_demo_value_side_finds_the_copy_through_pair(demo_scans):
    """Recovery of what was planted in the invented demo model: responder 2.2 moves writer 1.1's
    block-B write back into the token's block A, so the pair copies the token through to its own
    logit: the value side labels it (+1) and no other pair of the selection.

    Source: recovery of what was planted (composition.demo.PLANTED_VALUE_PAIRS)"""
    from composition.demo import PLANTED_VALUE_PAIRS

    value = demo_scans[("value", "full")]
    assert value.attrs["side"] == "value" and value.attrs["orientation"] == "row"
    assert _labelled(value) == _selected(PLANTED_VALUE_PAIRS, "1.1") == {((1, 1), (2, 2)): +1}
    assert value.top_share[1, 1, 2, 2][-1] > 0.9


def test_demo_mediation_parts(demo_scans):
    """Recovery of what was planted in the invented demo model: responder 2.4 reads writer 1.3 only
    through the write's projection on the token's unembedding direction (top-k shares survive
    `unembed`, fall to their null value under `rest`), responder 2.1 reads writer 1.1 only through
    another direction (the reverse); each part's write fraction is stored beside its shares, and the
    unembed fraction of the on-unembedding writer is not small.

    Source: recovery of what was planted (composition.demo.PLANTED_MEDIATION)"""
    from composition.demo import PLANTED_MEDIATION

    scans = {p: demo_scans[("query", p)] for p in ("full", "unembed", "rest")}
    k = int(scans["full"].k[-1])
    null = k / scans["full"].attrs["keys_per_row"]
    for (u, r), carrier in PLANTED_MEDIATION.items():
        ix = u + r
        other = "rest" if carrier == "unembed" else "unembed"
        full_top = scans["full"].top_share[ix][-1]
        assert scans["full"].label[ix] == +1 and full_top > 0.9
        assert scans[carrier].label[ix] == +1
        assert scans[carrier].top_share[ix][-1] > 0.9 * full_top  # survives
        assert scans[other].top_share[ix][-1] < 4 * null and scans[other].bottom_share[ix][-1] < 4 * null  # vanishes
        assert scans["full"].write_fraction[ix] == 1.0
        assert scans["unembed"].write_fraction[ix] + scans["rest"].write_fraction[ix] == pytest.approx(1.0)
        assert scans[carrier].attrs["query_part"] == carrier
    assert scans["unembed"].write_fraction[1, 3, 2, 4] > 0.2  # the on-unembedding part is not a sliver
    assert scans["unembed"].write_fraction[1, 1, 2, 1] < 0.02  # the off-unembedding writer barely has one


# ---------------------------------------------------------------------------
# every supported family
# ---------------------------------------------------------------------------

FAMILY_KINDS = {  # name: (transformers kind, overrides)
    "neox-parallel": ("neox", {}),  # parallel residual, partial rotary, untied readout
    "llama-gqa": ("llama", {}),  # RMSNorm, grouped-query, rotary with linear scaling
    "qwen2-bias": ("qwen2", {}),  # RMSNorm with query/key/value biases, tied readout
    "bert-mlm": ("bert", {}),  # post-norm encoder
}


@pytest.fixture(scope="module")
def families(tmp_path_factory):
    pytest.importorskip("transformers")
    from ..oracles import hf_models as hf

    out = {}
    for name, (kind, overrides) in FAMILY_KINDS.items():
        d = tmp_path_factory.mktemp(name)
        hf.build(kind, d, **overrides)
        w = load_weights(d)
        out[name] = (d, w, token_table(w, TableOptions("attn0-mlp0")))
    return out


@pytest.mark.parametrize("name", list(FAMILY_KINDS))
def test_every_side_and_part_on_every_family(families, tmp_path, name):
    """On small random models of every family the readers support (GPT-NeoX parallel with partial
    rotary, Llama-style grouped-query with scaled rotary, Qwen2-style with biases, BERT post-norm),
    every side and query part equals a dense float64 matrix re-derived from docs/methods.md (norms, linear
    parts and the post-norm residual path in NumPy, rotary offsets folded as ``q M k^T``), with
    every diagonal midrank exact; and a scan of each side and part runs and records it.

    Reference library: scipy.stats.rankdata; transformers (the random models, read by the
    package's readers that are checked against it); Source: docs/methods.md §1, §3, §3b"""
    from composition.extract.rotary import offsets_rotation

    d, w, T = families[name]
    M = offsets_rotation(w, (0, 3)) if w.rotary is not None else None  # [dh, dh] or None
    writer, responder = (0, 1), (1, 2)
    (lU, hU), (lR, hR) = writer, responder
    A = writer_values(w, T, lU)[hU]
    for side, part in CASES:
        if side == "key":
            left, right = key_side(A, key_middles(w, lU, hU, lR, rotation=M)[hR], responder_queries(w, T, lR)[hR])
        elif side == "value":
            left, right = value_side(A, value_middles(w, lU, hU, lR)[hR], responder_readouts(w, lR)[hR])
        else:
            U = unembed_directions(w, lU)
            alpha = unembed_coefficients(A, w.layers[lU].attn.W_O[hU], U)
            left, right = query_part_side(A, query_middles(w, lU, hU, lR, rotation=M)[hR],
                                          responder_keys(w, T, lR)[hR], part, alpha,
                                          unembed_queries(w, U, lU, lR, rotation=M)[hR])
        S = osd.canonical_matrix(w, T.numpy(), writer, responder, side, part, None if M is None else M.numpy())
        _close((left @ right.T).numpy(), S, rtol=1e-9)
        np.testing.assert_array_equal(diagonal_midranks(left, right).numpy(), og.midranks_rows(S))
        scan = run_scan(d, tmp_path / f"{side}-{part}.h5",
                        ScanOptions(side=side, query_part=part, writers="0.1", responders="1.2",
                                    rotary_offsets=None if M is None else (0, 3)))
        assert scan.done[0, 1, 1, 2] and scan.attrs["side"] == side and scan.attrs["query_part"] == part
        assert scan.mean_percentile[0, 1, 1, 2] == summarise(og.midranks_rows(S), w.vocab_size).mean_percentile


@pytest.mark.parametrize("side,part", [("key", "full"), ("value", "full"), ("query", "rest")])
def test_sampled_rows_on_other_sides(small, tmp_path, side, part):
    """A sampled scan (--rows, rows drawn as numpy.random.default_rng(seed).permutation(V)[:rows])
    of the key side, the value side and a query part stores the statistics of exactly those rows'
    exact midranks in the oracle's dense matrix (on the key side the rows are query tokens).

    Reference library: scipy.stats.rankdata, numpy.random.default_rng; Source: docs/methods.md §3b, §4"""
    scan = run_scan(small.dir, tmp_path / "s.h5", ScanOptions(side=side, query_part=part, writers="0.1",
                                                             responders="2", rows=60, seed=5))
    rows = np.random.default_rng(5).permutation(CFG["vocab_size"])[:60]
    for hR in range(CFG["n_head"]):
        ranks = og.midranks_rows(_oracle(small, (0, 1), (2, hR), side, part), rows=rows)
        ix = (0, 1, 2, hR)
        assert scan.rows_evaluated[ix] == 60
        assert scan.mean_percentile[ix] == pytest.approx(np.mean(1 - ranks / (CFG["vocab_size"] - 1)), abs=1e-15)
        np.testing.assert_array_equal(scan.top_share[ix], [(ranks < k).mean() for k in scan.k])


def test_mediation_rows_recover_the_planted_parts(tmp_path):
    """Recovery of what was planted in the invented demo model: the mediation table
    (composition.interpret.predict.mediation_rows, shown by `composition shortlist --parts`) keeps the
    on-unembedding pair 1.3 -> 2.4 in `unembed` and loses it in `rest`, and the reverse for the
    off-unembedding pair 1.1 -> 2.1; each part's write fraction is reported beside its share and
    the two fractions add up to 1 (docs/methods.md §3b)."""
    from composition.demo import build_demo
    from composition.interpret.predict import mediation_rows

    model = build_demo(tmp_path / "demo")
    scans = {part: run_scan(model, tmp_path / f"{part}.h5",
                            ScanOptions(query_part=part, writers="1.1,1.3", responders="2.1,2.4"))
             for part in ("full", "unembed", "rest")}
    rows = {(r["writer"], r["responder"]): r
            for r in mediation_rows(scans["full"], {"unembed": scans["unembed"], "rest": scans["rest"]})}
    assert set(rows) == {("1.3", "2.4"), ("1.1", "2.1")}
    on, off = rows[("1.3", "2.4")], rows[("1.1", "2.1")]
    assert on["unembed"] > 0.9 and on["rest"] < 0.1
    assert off["rest"] > 0.9 and off["unembed"] < 0.1
    for r in (on, off):
        assert r["unembed_write_fraction"] + r["rest_write_fraction"] == pytest.approx(1.0, abs=1e-9)
    with pytest.raises(CompositionError, match="query part"):
        mediation_rows(scans["full"], {"full": scans["full"]})
    from composition.present.report import write_report

    index = write_report(tmp_path / "full.h5", tmp_path / "report",
                         part_paths=[tmp_path / "unembed.h5", tmp_path / "rest.h5"])
    page = index.read_text()
    assert 'id="mediation"' in page and "0.275" in page  # 1.3 -> 2.4: the unembed part's write fraction
    assert len((tmp_path / "report" / "tables" / "mediation.csv").read_text().splitlines()) == 1 + 2

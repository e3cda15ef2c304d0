"""Writer groups (composition.compose.groups): a group's factors against dense float64 oracles
(tests/oracles/dense_gpt2.py, dense_sides.py, written from docs/methods.md) on a small random checkpoint."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from composition import CompositionError, load_weights
from composition.compose.factors import (key_side, query_middles, responder_keys, responder_queries,
                                         responder_readouts, value_side, writer_values)
from composition.compose.groups import (WriterGroup, group_key_middles, group_output, group_query_left,
                                        group_query_middles, group_readouts, group_value_middles, group_values,
                                        parse_group, parse_groups)
from composition.extract.tables import TableOptions, token_table
from composition.interpret.heads import ov_factors
from composition.score.ranks import diagonal_midranks

from ..oracles import dense_gpt2 as og
from ..oracles import dense_sides as osd
from ..small_checkpoint import random_gpt2

GROUP = WriterGroup("mixed", ((0, 1), (1, 0), (1, 3)))  # members in two layers
RESPONDERS = [(2, 0), (2, 3)]


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    path, sd, cfg = random_gpt2(str(tmp_path_factory.mktemp("groups") / "m"), seed=5, V=300, d=64, H=4, L=3)
    w = load_weights(path)
    T = token_table(w, TableOptions("attn0-mlp0"))  # [V, d]
    return dict(sd=sd, cfg=cfg, w=w, T=T, T_oracle=og.token_table(sd, cfg, "attn0-mlp0", None))


def _group_query(small, group, responder):
    w, T = small["w"], small["T"]
    lR, hR = responder
    left = group_query_left(group_values(w, T, group), group_query_middles(w, group, lR)[hR])  # [V, dh]
    return left, responder_keys(w, T, lR)[hR]  # [V, dh], [V, dh]


@pytest.mark.parametrize("responder", RESPONDERS)
def test_group_token_matrix_is_the_sum_of_members_dense_matrices(small, responder):
    """Source: docs/methods.md §3 (each member's write through its own path; the group writes their sum),
    with the dense float64 oracle tests/oracles/dense_gpt2.py; ranks against scipy.stats.rankdata
    (Reference library: SciPy)."""
    left, K = _group_query(small, GROUP, responder)
    ours = (left @ K.T).numpy() * og.attn_scale(small["cfg"], responder[0])  # [V, V], small V only
    dense = sum(og.dense_token_matrix(small["sd"], small["cfg"], small["T_oracle"], m, responder)
                for m in GROUP.members)
    assert np.max(np.abs(ours - dense)) <= 1e-9 * np.max(np.abs(dense))
    np.testing.assert_array_equal(diagonal_midranks(left, K).numpy(), og.midranks_rows(dense))


@pytest.mark.parametrize("side", ["key", "value"])
def test_group_key_and_value_sides_are_the_sums_of_members(small, side):
    """Source: docs/methods.md §3b (both sides are linear in the write), with the dense oracle
    tests/oracles/dense_sides.py; ranks against scipy.stats.rankdata (Reference library: SciPy)."""
    w, T = small["w"], small["T"]
    lR, hR = responder = (2, 1)
    A = group_values(w, T, GROUP)  # [V, 3 dh]
    if side == "key":
        left, right = key_side(A, group_key_middles(w, GROUP, lR)[hR], responder_queries(w, T, lR)[hR])
        dense = sum(osd.dense_key_matrix(small["sd"], small["cfg"], small["T_oracle"], m, responder)
                    for m in GROUP.members)
    else:
        left, right = value_side(A, group_value_middles(w, GROUP, lR)[hR], responder_readouts(w, lR)[hR])
        dense = sum(osd.dense_value_matrix(small["sd"], small["cfg"], small["T_oracle"], m, responder)
                    for m in GROUP.members)
    scale = og.attn_scale(small["cfg"], lR) if side == "key" else 1.0  # the key oracle carries the score scale
    ours = (left @ right.T).numpy() * scale
    assert np.max(np.abs(ours - dense)) <= 1e-9 * np.max(np.abs(dense))
    np.testing.assert_array_equal(diagonal_midranks(left, right).numpy(), og.midranks_rows(dense))


def test_one_member_group_equals_the_single_writer_exactly(small):
    """Common practice, no source: a group of one head is that head: the same factors bit for bit."""
    w, T = small["w"], small["T"]
    one = parse_group("solo=1.2", w.n_layers, w.n_heads)
    assert torch.equal(group_values(w, T, one), writer_values(w, T, 1)[2])
    assert torch.equal(group_query_middles(w, one, 2), query_middles(w, 1, 2, 2))
    assert torch.equal(group_output(w, one), w.layers[1].attn.W_O[2].double())
    _, B = ov_factors(w, T, 1)
    assert torch.equal(group_readouts(w, one), B[2])
    left, K = _group_query(small, one, (2, 0))
    single = writer_values(w, T, 1)[2] @ query_middles(w, 1, 2, 2)[0]
    assert torch.equal(left, single)
    np.testing.assert_array_equal(diagonal_midranks(left, K).numpy(), diagonal_midranks(single, K).numpy())


@pytest.mark.parametrize("precision", ["fp32", "bf16-checked"])
def test_group_ov_matrix_and_the_kernel_take_any_inner_dimension(small, precision):
    """Source: docs/methods.md §5 (OV token matrix; the group's is its members' sum, rank <= 3 dh = 48),
    dense oracle tests/oracles/dense_gpt2.py; ranks against scipy.stats.rankdata (Reference library: SciPy)."""
    w, T = small["w"], small["T"]
    A, B = group_values(w, T, GROUP), group_readouts(w, GROUP)  # [V, 48], [V, 48]
    assert A.shape[1] == B.shape[1] == 3 * w.d_head
    dense = sum(og.dense_ov_matrix(small["sd"], small["cfg"], small["T_oracle"], *m) for m in GROUP.members)
    ours = (A @ B.T).numpy()
    assert np.max(np.abs(ours - dense)) <= 1e-9 * np.max(np.abs(dense))
    np.testing.assert_array_equal(diagonal_midranks(A, B, precision=precision).numpy(), og.midranks_rows(dense))
    o_G = A @ group_output(w, GROUP)  # [V, d] the group's write
    writes = sum(osd.writer_write(small["sd"], small["cfg"], small["T_oracle"], m) for m in GROUP.members)
    assert np.max(np.abs(o_G.numpy() - writes)) <= 1e-9 * np.max(np.abs(writes))


@pytest.mark.parametrize("spec, message", [
    ("noequals", "NAME=L.H"),
    ("1bad=1.0", "must start with a letter"),
    ("g=1.0+x", "not a head label"),
    ("g=" + "1" * 5000 + ".0", "not a head label"),  # beyond Python's digit limit of int(): still a sentence
    ("g=7.0", "layers 0-2"),
    ("g=1.9", "heads 0-3"),
    ("g=1.0+1.0", "named twice"),
])
def test_group_parser_errors_are_one_sentence(spec, message):
    """Common practice, no source: a malformed --writer-group is refused with one sentence naming it."""
    with pytest.raises(CompositionError, match=message) as err:
        parse_group(spec, 3, 4)
    assert "\n" not in str(err.value)


def test_group_parser_normalises_and_checks_the_set():
    """Common practice, no source: members sorted by layer and head; duplicate names and groups with no later
    responder are refused; responders must come after every member."""
    g = parse_group(" copiers = 1.2 + 0.3 ", 3, 4)
    assert g == WriterGroup("copiers", ((0, 3), (1, 2))) and g.spec == "copiers=0.3+1.2" and g.last_layer == 1
    with pytest.raises(CompositionError, match="used twice"):
        parse_groups(["a=0.1", "a=0.2"], 3, 4)
    with pytest.raises(CompositionError, match="last layer"):
        parse_groups(["late=2.1"], 3, 4)
    with pytest.raises(CompositionError, match="must come after every member"):
        group_query_middles(None, g, 1)


def test_demo_group_is_labelled_only_together(tmp_path):
    """Recovery of what was planted in the invented writer-group demo model (composition.demo.WRITER_GROUPS,
    data_cards/demo-model.md): a single-writer scan labels no writer of responder 3.0, each member alone
    moves its mean percentile by less than the label threshold, and the four members together by more."""
    from composition import ScanOptions, run_scan
    from composition.compose.groups import group_statistics
    from composition.demo import WRITER_GROUPS, build_group_demo
    from composition.score.stats import DEFAULT_MIN_EFFECT

    model = build_group_demo(tmp_path / "g")
    scan = run_scan(model, tmp_path / "g.h5", ScanOptions(writers="1,2", responders="3.0"))
    members, (lR, hR) = WRITER_GROUPS["quartet"]
    assert not np.isin(scan.label[:, :, lR, hR], (1, -1)).any()
    w = load_weights(model)
    T = token_table(w, TableOptions("attn0-mlp0"))
    for m in members:
        alone = group_statistics(w, T, WriterGroup("one", (m,)), lR)[hR]
        assert 0.55 < alone.mean_percentile < 0.5 + DEFAULT_MIN_EFFECT - 0.02
        assert alone.mean_percentile == pytest.approx(scan.mean_percentile[m + (lR, hR)], abs=1e-12)
    together = group_statistics(w, T, WriterGroup("quartet", members), lR)[hR]
    assert together.mean_percentile > 0.5 + DEFAULT_MIN_EFFECT + 0.03
    assert together.p_value < 1e-10

"""Rotary positions (composition/rotary.py) and their folding into the query side.

Every convention is checked against the `transformers` implementation of the family:
split-half pairs (Llama, GPT-NeoX with partial rotary), interleaved pairs (GPT-J),
frequency scaling (linear, llama3), and the average over offsets.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import scipy.stats
import torch
from click.testing import CliRunner

os.environ.setdefault("HF_HUB_OFFLINE", "1")
transformers = pytest.importorskip("transformers")

from composition import CompositionError, ScanOptions, load_weights, run_scan  # noqa: E402
from composition.present.cli import main  # noqa: E402
from composition.compose.factors import query_middles, responder_keys, writer_values  # noqa: E402
from composition.extract.rotary import (  # noqa: E402
    inverse_frequencies, mean_rotation, offsets_rotation, rotary_from_config, rotation)
from composition.extract.tables import TableOptions, token_table  # noqa: E402
from composition.extract.weights import Rotary  # noqa: E402
from ..oracles import hf_models as hf  # noqa: E402

T_POS = 24


def _assert_split_half_like(rot: Rotary, dh: int, emb, apply, seed: int) -> None:
    """Our ``q_i M(i - j) k_j`` equals the library-rotated scores ``rot(q_i) . rot(k_j)`` of random
    ``q, k [T, dh]`` (``emb`` the library's rotary embedding, ``apply`` its apply_rotary_pos_emb)."""
    g = torch.Generator().manual_seed(seed)
    q, k = torch.randn(T_POS, dh, generator=g), torch.randn(T_POS, dh, generator=g)
    cos, sin = emb(q[None], torch.arange(T_POS)[None])
    qr, kr = apply(q[None, None], k[None, None], cos, sin)  # [1, 1, T, dh]
    ref = (qr[0, 0] @ kr[0, 0].T).double()  # [T, T]
    assert torch.allclose(_lower(_ours(rot, dh, q, k)), _lower(ref), rtol=1e-5, atol=1e-5)


def _ours(rot: Rotary, dh, q, k):
    """``q_i M(i - j) k_j`` for j <= i. # -> [T, T] (upper triangle nan)"""
    T = q.shape[0]
    out = torch.full((T, T), float("nan"), dtype=torch.float64)
    for i in range(T):
        for j in range(i + 1):
            out[i, j] = q[i].double() @ rotation(rot, dh, i - j) @ k[j].double()
    return out


def _lower(x):
    return x[torch.tril(torch.ones_like(x, dtype=torch.bool))]


def test_split_half_full_rotary_matches_llama():
    """Llama: split-half pairs over the whole head, linear frequency scaling.
    Reference library: transformers (LlamaRotaryEmbedding, apply_rotary_pos_emb).
    """
    from transformers.models.llama import modeling_llama as ml

    cfg = hf.config("llama")
    emb = ml.LlamaRotaryEmbedding(cfg)
    dh = cfg.hidden_size // cfg.num_attention_heads
    rot = rotary_from_config(cfg.to_dict(), dh, "split-half")
    assert rot.dims == dh and rot.scaling == "linear"
    torch.testing.assert_close(rot.inv_freq, emb.inv_freq, rtol=0, atol=0)
    _assert_split_half_like(rot, dh, emb, ml.apply_rotary_pos_emb, seed=1)


@pytest.mark.parametrize("fraction", [0.25, 0.5])
def test_split_half_partial_rotary_matches_neox(fraction):
    """GPT-NeoX: split-half pairs over the first fraction of each head, identity elsewhere.
    Reference library: transformers (GPTNeoXRotaryEmbedding, apply_rotary_pos_emb).
    """
    from transformers.models.gpt_neox import modeling_gpt_neox as mn

    cfg = hf.config("neox", rotary_pct=fraction)
    cfg = transformers.GPTNeoXConfig(**{**cfg.to_dict(), "rope_parameters": {
        "rope_type": "default", "rope_theta": 10000.0, "partial_rotary_factor": fraction}})
    emb = mn.GPTNeoXRotaryEmbedding(cfg)
    dh = cfg.hidden_size // cfg.num_attention_heads
    rot = rotary_from_config(cfg.to_dict(), dh, "split-half", default_fraction=0.25)
    assert rot.dims == int(dh * fraction)
    torch.testing.assert_close(rot.inv_freq, emb.inv_freq, rtol=0, atol=0)
    _assert_split_half_like(rot, dh, emb, mn.apply_rotary_pos_emb, seed=2)


def test_old_flat_neox_config_keys():
    """Older GPT-NeoX configs give rotary_pct and rotary_emb_base at the top level.
    Reference library: transformers (GPTNeoXConfig's defaults: rotary_pct 0.25, base 10000).
    """
    rot = rotary_from_config({"rotary_pct": 0.25, "rotary_emb_base": 10000}, 64, "split-half")
    cfg = transformers.GPTNeoXConfig(hidden_size=256, num_attention_heads=4)
    from transformers.models.gpt_neox import modeling_gpt_neox as mn

    assert rot.dims == 16
    torch.testing.assert_close(rot.inv_freq, mn.GPTNeoXRotaryEmbedding(cfg).inv_freq, rtol=0, atol=0)


def test_interleaved_matches_gptj():
    """GPT-J: interleaved pairs (2i, 2i+1) over the first rotary_dim dimensions.
    Reference library: transformers (gptj create_sinusoidal_positions, apply_rotary_pos_emb).
    """
    from transformers.models.gptj import modeling_gptj as mj

    dh, rd = 16, 8
    rot = rotary_from_config({"rotary_dim": rd}, dh, "interleaved")
    g = torch.Generator().manual_seed(3)
    q, k = torch.randn(T_POS, dh, generator=g), torch.randn(T_POS, dh, generator=g)
    sincos = mj.create_sinusoidal_positions(T_POS, rd)[None]  # [1, T, rd]
    sin, cos = torch.split(sincos, rd // 2, dim=-1)

    def rotate(x):  # x [T, dh] -> library-rotated [T, dh]
        x4 = x[None, :, None, :]  # [1, T, 1, dh]
        r = mj.apply_rotary_pos_emb(x4[..., :rd], sin, cos)
        return torch.cat([r, x4[..., rd:]], dim=-1)[0, :, 0]

    ref = (rotate(q) @ rotate(k).T).double()
    assert torch.allclose(_lower(_ours(rot, dh, q, k)), _lower(ref), rtol=1e-5, atol=1e-5)


def test_llama3_frequency_scaling():
    """Llama 3.1 scaling of the inverse frequencies.
    Reference library: transformers (modeling_rope_utils ROPE_INIT_FUNCTIONS['llama3']).
    """
    from transformers.modeling_rope_utils import ROPE_INIT_FUNCTIONS

    scaling = {"rope_type": "llama3", "factor": 8.0, "low_freq_factor": 1.0, "high_freq_factor": 4.0,
               "original_max_position_embeddings": 64, "rope_theta": 500000.0}
    cfg = transformers.LlamaConfig(hidden_size=256, num_attention_heads=2, max_position_embeddings=512,
                                   rope_parameters=scaling)
    ref, _ = ROPE_INIT_FUNCTIONS["llama3"](cfg)
    rot = rotary_from_config(cfg.to_dict(), 128, "split-half")
    assert rot.scaling == "llama3"
    torch.testing.assert_close(rot.inv_freq, ref, rtol=1e-6, atol=0)
    plain = inverse_frequencies(128, 500000.0)
    assert not torch.allclose(rot.inv_freq, plain)  # the scaling changed something


def test_mean_rotation_equals_average_of_library_scores():
    """The uniform average of M(delta) over delta in [A, B] gives the mean of the library's
    rotated scores over those offsets: q M_bar k^T = mean_delta rot(q, j+delta) . rot(k, j).
    Reference library: transformers (Llama rotary).
    """
    from transformers.models.llama import modeling_llama as ml

    cfg = hf.config("llama")
    emb = ml.LlamaRotaryEmbedding(cfg)
    dh = 16
    rot = rotary_from_config(cfg.to_dict(), dh, "split-half")
    g = torch.Generator().manual_seed(4)
    q, k = torch.randn(1, dh, generator=g), torch.randn(1, dh, generator=g)
    A, B, j = 2, 9, 3
    cos, sin = emb(q[None], torch.arange(j + B + 1)[None])  # [1, P, dh]
    qs = q.expand(j + B + 1, dh)
    ks = k.expand(j + B + 1, dh)
    qr, kr = ml.apply_rotary_pos_emb(qs[None, None], ks[None, None], cos, sin)
    ref = torch.stack([qr[0, 0, j + dlt] @ kr[0, 0, j] for dlt in range(A, B + 1)]).double().mean()
    ours = q.double()[0] @ mean_rotation(rot, dh, A, B) @ k.double()[0]
    assert torch.isclose(ours, ref, rtol=1e-5, atol=1e-6)
    # a single offset is a rotation: orthogonal; an average over a range is not
    M1, Mbar = rotation(rot, dh, 5), mean_rotation(rot, dh, A, B)
    assert torch.allclose(M1 @ M1.T, torch.eye(dh, dtype=torch.float64), atol=1e-12)
    assert not torch.allclose(Mbar @ Mbar.T, torch.eye(dh, dtype=torch.float64), atol=1e-3)


def test_unknown_scaling_refused_for_nonzero_offsets():
    """A scaling type the tool does not implement (yarn) reads, allows offset 0 and refuses
    other offsets with a sentence. Common practice, no source.
    """
    rot = rotary_from_config({"rope_parameters": {"rope_type": "yarn", "factor": 4.0, "rope_theta": 1e4}},
                             16, "split-half")
    assert rot.unsupported and "yarn" in rot.unsupported
    assert torch.equal(mean_rotation(rot, 16, 0, 0), torch.eye(16, dtype=torch.float64))
    with pytest.raises(CompositionError, match="yarn"):
        mean_rotation(rot, 16, 1, 4)


@pytest.fixture(scope="module")
def llama_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("llama")
    hf.build("llama", d)
    return d


def test_folded_offsets_match_dense_rotated_scores(llama_dir, tmp_path):
    """A scan with --rotary-offsets A:B gives, for a pair, the mean percentile of the dense
    token matrix built by rotating queries and keys with the library's own rotary at every
    offset and averaging the scores, ranked with scipy.stats.rankdata (docs/methods.md §3, §4).
    Reference library: transformers (Llama rotary), scipy (rankdata).
    """
    from transformers.models.llama import modeling_llama as ml

    w = load_weights(llama_dir)
    A, B = 1, 6
    scan = run_scan(llama_dir, tmp_path / "rot.h5", ScanOptions(writers="0.1", responders="1.2", k=(1,),
                                                                 rotary_offsets=(A, B)))
    assert scan.attrs["rotary_offsets"] == f"{A}:{B}"
    T = token_table(w, TableOptions())
    Q = writer_values(w, T, 0)[1] @ query_middles(w, 0, 1, 1)[2]  # [V, dh], no rotation folded
    K = responder_keys(w, T, 1)[2]  # [V, dh]
    cfg = hf.config("llama")
    emb = ml.LlamaRotaryEmbedding(cfg)
    cos, sin = emb(Q[None].float(), torch.arange(B + 1)[None])
    cos, sin = cos.double(), sin.double()
    S = torch.zeros(Q.shape[0], K.shape[0], dtype=torch.float64)
    for dlt in range(A, B + 1):  # destination at position dlt, source at 0
        qr = Q * cos[0, dlt] + ml.rotate_half(Q) * sin[0, dlt]
        kr = K * cos[0, 0] + ml.rotate_half(K) * sin[0, 0]
        S += qr @ kr.T
    S /= B - A + 1
    V = S.shape[0]
    ranks = np.array([V - scipy.stats.rankdata(S[t].numpy(), method="average")[t] for t in range(V)])
    mean_pct = float(np.mean(1 - ranks / (V - 1)))
    assert scan.mean_percentile[0, 1, 1, 2] == pytest.approx(mean_pct, abs=1e-12)
    plain = run_scan(llama_dir, tmp_path / "plain.h5", ScanOptions(writers="0.1", responders="1.2", k=(1,)))
    assert plain.attrs["rotary_offsets"] == "0:0"
    assert plain.mean_percentile[0, 1, 1, 2] != scan.mean_percentile[0, 1, 1, 2]
    assert plain.attrs["fingerprint"] != scan.attrs["fingerprint"]


def test_default_offset_is_no_rotation(llama_dir, tmp_path):
    """Rotary models default to offset 0 (no rotation): the same numbers and fingerprint as
    --rotary-offset 0, recorded as 0:0. Common practice, no source (M(0) = I).
    """
    opts = dict(writers="0.0", responders="1.0", k=(1,))
    a = run_scan(llama_dir, tmp_path / "a.h5", ScanOptions(**opts))
    b = run_scan(llama_dir, tmp_path / "b.h5", ScanOptions(**opts, rotary_offsets=(0, 0)))
    assert a.attrs["fingerprint"] == b.attrs["fingerprint"] and a.attrs["rotary_offsets"] == "0:0"
    assert np.array_equal(a.mean_percentile, b.mean_percentile, equal_nan=True)
    w = load_weights(llama_dir)
    assert offsets_rotation(w, None) is None and offsets_rotation(w, (0, 0)) is None


def test_cli_rotary_options(llama_dir, tmp_path):
    """CLI: --rotary-offset N and --rotary-offsets A:B reach the scan file; a model without
    rotary (BERT-style) refuses them with one sentence and exit 2; a malformed range too.
    Common practice, no source.
    """
    r = CliRunner()
    out = tmp_path / "o.h5"
    res = r.invoke(main, ["scan", str(llama_dir), "-o", str(out), "--writers", "0.0", "--responders", "1.0",
                          "--rotary-offset", "3", "-q"])
    assert res.exit_code == 0, res.output
    from composition import load_scan

    assert load_scan(out).attrs["rotary_offsets"] == "3:3"
    res = r.invoke(main, ["inspect", str(llama_dir), "--rotary-offsets", "0:16"])
    assert res.exit_code == 0 and "uniform average" in res.output and "split-half" in res.output
    bert = tmp_path / "bert"
    hf.build("bert-base", bert)
    for args in (["inspect", str(bert), "--rotary-offset", "2"],
                 ["scan", str(bert), "-o", str(tmp_path / "x.h5"), "--rotary-offsets", "0:4", "-q"],
                 ["inspect", str(llama_dir), "--rotary-offsets", "4:2"],
                 ["inspect", str(llama_dir), "--rotary-offsets", "a:b"]):
        res = r.invoke(main, args)
        assert res.exit_code == 2, args
        assert len(res.stderr.strip().splitlines()) == 1 and "rotary-offset" in res.stderr
        assert "Traceback" not in res.output
    assert not (tmp_path / "x.h5").exists()

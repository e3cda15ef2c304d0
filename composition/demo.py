"""The demo model: an invented GPT-2-layout checkpoint with planted heads.

Everything here is made up for demonstration and for recovery tests (see
``data_cards/demo-model.md``). The generator is deterministic: the same seed writes the
same bytes. Token embeddings are random; orthonormal 32-dimensional subspaces, all
orthogonal to each other and to the all-ones direction, carry the planted circuits:

* writers in layer 1 copy their token's component in one subspace into the residual;
* responders in layers 2-3 read a writer's subspace with their query and key (the sign
  of the key decides attention-raising or attention-lowering) and write into a subspace
  of their own, copying (+) or suppressing (-) the attended token.

The other sides and the mediation parts (docs/methods.md §3b) have circuits of their own, planted in
16-dimensional blocks of the free space (subspace 6 and the 31-dimensional remainder):

* writer 1.1 moves the token's block-A component into block B (the write of a previous-token
  head: what it writes is the attended token, in a different subspace). Responder 2.0 queries
  with the token's own block A and keys on block B: induction-like, seen by the key side only.
  Responder 2.1 queries with block B and keys on block A: seen by the query side, through the
  part of the write off the token's unembedding direction (``rest``). Responder 2.2 reads
  block B with its value and writes block A: the pair copies the token through (value side).
* writer 1.3 copies blocks C and D; the token embedding carries fixed shares of its norm in
  C and D, and the D write is exactly the D component of the write's projection on the
  token's own unembedding direction. Responder 2.4 reads block D with query and key: it reads
  the writer only through the unembedding direction (``unembed``).

Every planted weight carries a small random perturbation; all other heads are random.

Beyond one head at a time (docs/groups.md, docs/compare.md): :func:`build_demo_after` writes the
same model with one planted circuit left out (two checkpoints "before and after a change", to
compare), and :func:`build_group_demo` a second, smaller invented model with a group of writers
that a responder answers only together, and a responder with a generic preference for each
token's own key. :func:`beyond_single_heads` builds, scans and compares them for the demo.
"""

from __future__ import annotations

import json
from pathlib import Path

import torch

SIZES = dict(vocab_size=4096, n_embd=256, n_head=8, n_layer=4, n_positions=128)
SUB = 32  # width of a planted subspace (= head width)

# name: (writer head, responder head, writer subspace, responder subspace,
#        QK sign (+1 raising, -1 lowering), responder OV sign (+1 copying, -1 suppressing))
PLANTED_CIRCUITS = {
    "suppressor": ((1, 0), (2, 3), 0, 1, +1, -1),
    "back-up": ((1, 2), (3, 1), 2, 3, -1, +1),
    "reinforcer": ((1, 5), (3, 6), 4, 5, +1, +1),
}

# Circuits for the other sides and the mediation parts (docs/methods.md §3b), planted in 16-dimensional
# blocks of the space PLANTED_CIRCUITS leave free. name: (writer head, responder head, what it shows)
SIDE_CIRCUITS = {
    "induction-like": ((1, 1), (2, 0), "key side: queries with the token's block A, keys on the writer's block B"),
    "off-unembedding": ((1, 1), (2, 1), "query side, through the part of the write off the token's unembedding direction"),
    "copy-through": ((1, 1), (2, 2), "value side: moves the writer's block B back to block A, read at the logits"),
    "on-unembedding": ((1, 3), (2, 4), "query side, only through the write's projection on the token's unembedding direction"),
}
BLOCK = 16  # width of the side circuits' blocks
_SHARE_C = 0.25  # fixed share of each token's centred squared embedding norm in block C

# (writer, responder) -> expected query-side label, for the recovery tests: exactly the
# query-side labels of the demo
PLANTED_PAIRS = {**{(c[0], c[1]): c[4] for c in PLANTED_CIRCUITS.values()},
                 ((1, 1), (2, 1)): +1, ((1, 3), (2, 4)): +1}
# (writer, responder) -> expected key-side label (row orientation): every pair whose responder
# keys on a writer's write and queries with the same token's own component
PLANTED_KEY_PAIRS = {**{(c[0], c[1]): c[4] for c in PLANTED_CIRCUITS.values()},
                     ((1, 1), (2, 0)): +1, ((1, 3), (2, 4)): +1}
# (writer, responder) -> expected value-side label (+1 copies through, -1 suppresses)
PLANTED_VALUE_PAIRS = {((1, 1), (2, 2)): +1}
# (writer, responder) -> the --query-part through which the responder reads the writer: its
# top-k shares survive in that part and vanish (fall to their null value) in the other. The
# three PLANTED_CIRCUITS pairs keep their shares in both parts: their writers copy, so the
# write's projection on the token's unembedding direction reads like the whole write.
PLANTED_MEDIATION = {((1, 3), (2, 4)): "unembed", ((1, 1), (2, 1)): "rest"}
# head -> expected OV sign (+1 copying, -1 suppressing); writers 1.0, 1.2, 1.5 and 1.3 copy
PLANTED_HEADS = {**{c[0]: +1 for c in PLANTED_CIRCUITS.values()},
                 **{c[1]: c[5] for c in PLANTED_CIRCUITS.values()},
                 (1, 3): +1}


def build_demo(directory: str | Path, seed: int = 0, without: tuple[str, ...] = ()) -> Path:
    """Write ``model.safetensors`` and ``config.json`` of the demo model into ``directory``.

    ``without``: names of PLANTED_CIRCUITS left out: their responder's query and key weights keep
    the random values every unplanted head has, and every other tensor is byte for byte the same
    (the invented "after a change" checkpoint, :func:`build_demo_after`).
    """
    g = torch.Generator().manual_seed(seed)
    for name in without:
        if name not in PLANTED_CIRCUITS:
            raise ValueError(f"{name!r} is not one of the demo's planted circuits: {', '.join(PLANTED_CIRCUITS)}")
    V, d, H, L, P = (SIZES[k] for k in ("vocab_size", "n_embd", "n_head", "n_layer", "n_positions"))
    dh = d // H

    def randn(*shape, std=1.0):
        return torch.randn(*shape, generator=g, dtype=torch.float64) * std

    basis = _subspaces(randn(d, d), d)  # [d, d-1] orthonormal, orthogonal to ones

    def sub(i):
        return basis[:, i * SUB:(i + 1) * SUB]  # [d, SUB]

    W_Q, W_K, W_V = (randn(L, H, d, dh, std=d**-0.5) for _ in range(3))  # [L, H, d, dh]
    W_O = randn(L, H, dh, d, std=dh**-0.5)  # [L, H, dh, d]
    W_O[0] *= 0.01  # layer 0 stays small so the token table keeps each token's identity

    def plant(tensor, layer, head, value, noise=0.1):
        tensor[layer, head] = value + noise * randn(*value.shape, std=float(value.norm()) / value.numel() ** 0.5)

    for name, ((lu, hu), (lr, hr), s_w, s_r, qk, ov) in PLANTED_CIRCUITS.items():
        random_qk = (W_Q[lr, hr].clone(), W_K[lr, hr].clone())
        plant(W_V, lu, hu, sub(s_w))
        plant(W_O, lu, hu, sub(s_w).T)
        plant(W_Q, lr, hr, sub(s_w))
        plant(W_K, lr, hr, qk * sub(s_w))
        plant(W_V, lr, hr, sub(s_r))
        plant(W_O, lr, hr, ov * sub(s_r).T)
        if name in without:  # drawn as always (the generator moves on the same), then put back
            W_Q[lr, hr], W_K[lr, hr] = random_qk
    # a generator of its own, so every tensor drawn below is the same as without the side circuits
    _plant_side_circuits(W_Q, W_K, W_V, W_O, _blocks(basis), torch.Generator().manual_seed(seed + 1))

    note = "invented demo model of the composition project; see data_cards/demo-model.md"
    if without:
        note += f" (left out: {', '.join(without)})"
    return _write_gpt2(directory, _fix_block_shares(randn(V, d), _blocks(basis)), W_Q, W_K, W_V, W_O, randn,
                       SIZES, note)


def _write_gpt2(directory, wte, W_Q, W_K, W_V, W_O, randn, sizes: dict, note: str) -> Path:
    """Write an invented GPT-2-layout checkpoint (weights, config, invented vocabulary) into ``directory``.

    # wte [V, d]; W_Q, W_K, W_V [L, H, d, dh]; W_O [L, H, dh, d]. ``randn(*shape, std=)`` draws the
    positions, biases, norms and MLPs, in this fixed order.
    """
    from safetensors.torch import save_file

    V, d, H, L, P = (sizes[k] for k in ("vocab_size", "n_embd", "n_head", "n_layer", "n_positions"))
    m = 4 * d
    t = {"wte.weight": wte, "wpe.weight": randn(P, d, std=0.01)}
    for i in range(L):
        p = f"h.{i}."
        per_head = lambda W: W[i].permute(1, 0, 2).reshape(d, d)  # noqa: E731  [H, d, dh] -> [d, H*dh]
        t[p + "attn.c_attn.weight"] = torch.cat([per_head(W_Q), per_head(W_K), per_head(W_V)], 1)  # [d, 3d]
        t[p + "attn.c_attn.bias"] = randn(3 * d, std=0.02)
        t[p + "attn.c_proj.weight"] = W_O[i].reshape(d, d)  # [H*dh, d]
        t[p + "attn.c_proj.bias"] = randn(d, std=0.02)
        for ln in ("ln_1", "ln_2"):
            t[p + ln + ".weight"] = 1.0 + randn(d, std=0.02)
            t[p + ln + ".bias"] = randn(d, std=0.02)
        t[p + "mlp.c_fc.weight"] = randn(d, m, std=d**-0.5)
        t[p + "mlp.c_fc.bias"] = randn(m, std=0.02)
        t[p + "mlp.c_proj.weight"] = randn(m, d, std=m**-0.5) * (0.01 if i == 0 else 1.0)
        t[p + "mlp.c_proj.bias"] = randn(d, std=0.02)
    t["ln_f.weight"] = 1.0 + randn(d, std=0.02)
    t["ln_f.bias"] = randn(d, std=0.02)

    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    tensors = {"transformer." + k: v.to(torch.float32).contiguous() for k, v in t.items()}
    save_file(tensors, str(out / "model.safetensors"), metadata={"format": "pt"})
    config = {
        "model_type": "gpt2",
        "architectures": ["GPT2LMHeadModel"],
        **sizes,
        "n_ctx": P,
        "n_inner": None,
        "activation_function": "gelu_new",
        "layer_norm_epsilon": 1e-5,
        "tie_word_embeddings": True,
        "note": note,
    }
    (out / "config.json").write_text(json.dumps(config, indent=2) + "\n")
    # An invented vocabulary, so reports can show token text (plain-JSON tokenizer.json).
    vocab = {text: i for i, text in enumerate(_invented_words(V))}
    (out / "tokenizer.json").write_text(json.dumps({"model": {"type": "WordLevel", "vocab": vocab}}) + "\n")
    return out


def build_demo_after(directory: str | Path, seed: int = 0) -> Path:
    """The demo model "after a change" (invented): the same checkpoint with the ``suppressor`` circuit's
    responder query and key left random (:data:`AFTER_CHANGE`), everything else byte for byte the same."""
    return build_demo(directory, seed=seed, without=(AFTER_CHANGE,))


AFTER_CHANGE = "suppressor"  # the planted circuit build_demo_after leaves out: pair 1.0 -> 2.3

# ---------------------------------------------------------------------------
# The second invented model: writers acting together, and a responder with a generic preference
# (issue 14; docs/groups.md). A model of its own, so the first demo's findings stay as they are.
# ---------------------------------------------------------------------------

GROUP_SIZES = dict(vocab_size=2048, n_embd=128, n_head=4, n_layer=4, n_positions=64)
# name: (members, the responder that reacts to the group)
WRITER_GROUPS = {"quartet": (((1, 0), (1, 1), (2, 0), (2, 1)), (3, 0))}
GROUP_SIGNAL = 0.045  # each member's coherent share; its antisymmetric noise has entries of sd 1/sqrt(32)
# the responder with a generic preference for the token's own key, and the copying writers that light it up
GENERIC_RESPONDER = (3, 1)
GENERIC_WRITERS = ((1, 2), (2, 2))


def build_group_demo(directory: str | Path, seed: int = 0) -> Path:
    """Write the invented writer-group demo model (GPT-2 layout) into ``directory``.

    Orthonormal 32-dimensional blocks X, X2 and Y, orthogonal to each other and to the all-ones
    direction, carry what is planted (data_cards/demo-model.md):

    * the four members of ``quartet`` each read the token's block-X component and write it into block X2
      as ``x (c I + R_m)``: a small coherent part ``c`` (GROUP_SIGNAL) shared by all, and an antisymmetric
      random part ``R_m`` of each member's own, which adds spread without moving the diagonal. Responder
      3.0 queries block X2 and keys on block X. One member alone moves the diagonal too little to be
      labelled; the four together add their coherent parts (4c) while their random parts grow as 2.
    * responder 3.1 queries and keys on block Y: it prefers each token's own key whatever writes it.
      Writers 1.2 and 2.2 copy block Y, so both pairs are labelled, and so would be any write of the
      token: the identity reference of 3.1 is as high as these pairs.

    Layer 0 is kept small (x0.01) so the token table keeps each token's identity; every other head
    is random; planted weights carry a 5 % random perturbation.
    """
    g = torch.Generator().manual_seed(seed + 100)
    V, d, H, L = (GROUP_SIZES[k] for k in ("vocab_size", "n_embd", "n_head", "n_layer"))
    dh = d // H

    def randn(*shape, std=1.0):
        return torch.randn(*shape, generator=g, dtype=torch.float64) * std

    basis = _subspaces(randn(d, d), d)  # [d, d-1]
    X, X2, Y = (basis[:, i * dh:(i + 1) * dh] for i in range(3))  # [d, dh] each
    W_Q, W_K, W_V = (randn(L, H, d, dh, std=d**-0.5) for _ in range(3))  # [L, H, d, dh]
    W_O = randn(L, H, dh, d, std=dh**-0.5)  # [L, H, dh, d]
    W_O[0] *= 0.01

    def plant(tensor, head, value, noise=0.05):
        rms = float(value.norm()) / value.numel() ** 0.5
        tensor[head] = value + noise * randn(*value.shape, std=rms)

    members, responder = WRITER_GROUPS["quartet"]
    for head in members:
        R = randn(dh, dh, std=dh**-0.5)
        mix = GROUP_SIGNAL * torch.eye(dh, dtype=torch.float64) + (R - R.T) / 2**0.5  # [dh, dh]
        plant(W_V, head, X)
        plant(W_O, head, mix @ X2.T)
    plant(W_Q, responder, X2)
    plant(W_K, responder, X)
    for head in GENERIC_WRITERS:
        plant(W_V, head, Y)
        plant(W_O, head, Y.T)
    plant(W_Q, GENERIC_RESPONDER, Y)
    plant(W_K, GENERIC_RESPONDER, Y)
    return _write_gpt2(directory, randn(V, d), W_Q, W_K, W_V, W_O, randn, GROUP_SIZES,
                       "invented writer-group demo model of the composition project; see data_cards/demo-model.md")


COMPARE_SELECTION = dict(writers="1.0,1.2,1.5", responders="2.3,3.1,3.6")  # the planted circuits' pairs and more


def beyond_single_heads(root: str | Path, demo_model: str | Path | None = None) -> list[str]:
    """The issue-14 part of the demo: build the invented models, compute, and return the lines to print.

    Writes into ``root``: ``group-demo-model/`` (:func:`build_group_demo`), ``demo-model-after/``
    (:func:`build_demo_after`; ``demo_model`` is the first demo checkpoint, built into ``demo-model/``
    when not given), restricted scans of both (``demo-before.h5``, ``demo-after.h5``) and their comparison
    (``demo-compare/``). Everything here is invented (data_cards/demo-model.md).
    """
    import numpy as np

    from .compose import sides
    from .compose.references import band
    from .interpret.compare import compare_scans
    from .run.scan import ScanOptions, run_scan
    from .score.stats import DEFAULT_MIN_EFFECT

    root = Path(root)
    lines = ["writer groups and reference writers (invented model, data_cards/demo-model.md):"]
    model = build_group_demo(root / "group-demo-model")
    members, (lR, hR) = WRITER_GROUPS["quartet"]
    quartet = "quartet=" + "+".join(f"{l}.{h}" for l, h in members)
    scan = run_scan(model, root / "group-demo-scan.h5",
                    ScanOptions(writers="1,2", responders="3", writer_groups=(quartet,), references=True),
                    overwrite=True)
    for head in ((lR, hR), GENERIC_RESPONDER):
        labelled = np.isin(scan.label[:, :, head[0], head[1]], (1, -1))  # [L, H]
        found = [f"{a}.{b}" for a, b in zip(*labelled.nonzero())]
        lines.append(f"  single writers, responder {head[0]}.{head[1]}: labelled with "
                     f"{', '.join(found) if found else 'no writer'}")
    lines.append(f"  group {quartet} -> responder {lR}.{hR} (labels need |mean percentile - 0.5| >= "
                 f"{DEFAULT_MIN_EFFECT:g}):")
    for member in members:
        lines.append(f"    member {member[0]}.{member[1]} alone: mean percentile "
                     f"{scan.mean_percentile[member + (lR, hR)]:.3f}")
    table = scan.group_pairs()
    row = {k: v[(table["writer"] == "quartet") & (table["responder"] == f"{lR}.{hR}")][0] for k, v in table.items()}
    lines.append(f"    the group's row of the scan: mean percentile {row['mean_percentile']:.3f}, label "
                 f"{sides.get('query').words[int(row['label'])]}, q-value {row['q_value']:.1e}, above generic "
                 f"{row['above_generic']:+.3f}, random z {row['random_z']:.1f}")
    ref, attrs = scan.groups["references"], scan.group_attrs["references"]
    for head in (hR, GENERIC_RESPONDER[1]):
        lo, hi = band(ref["random_mean_percentile"][lR, head])
        lines.append(f"  responder {lR}.{head} references (from {scan.path.name}): identity "
                     f"{ref['identity_mean_percentile'][lR, head]:.3f}, unembedding "
                     f"{ref['unembedding_mean_percentile'][lR, head]:.3f}, random band {lo:.3f}-{hi:.3f} "
                     f"({attrs['draws']} draws, seed {attrs['seed']})")
    generic = scan.pairs()
    at = (generic["responder"] == f"{GENERIC_RESPONDER[0]}.{GENERIC_RESPONDER[1]}") & np.isin(generic["label"], (1, -1))
    lines.append(f"  responder {GENERIC_RESPONDER[0]}.{GENERIC_RESPONDER[1]} prefers each token's own key: its labelled "
                 f"pairs stand at most {np.max(np.abs(generic['above_generic'][at]), initial=0.0):.3f} above a generic "
                 f"write of the token (any write would do as well); responder {lR}.{hR} answers the group far above "
                 "its references")
    before = Path(demo_model) if demo_model is not None else build_demo(root / "demo-model")
    after = build_demo_after(root / "demo-model-after")
    options = ScanOptions(**COMPARE_SELECTION)
    scans = [run_scan(before, root / "demo-before.h5", options, overwrite=True).path,
             run_scan(after, root / "demo-after.h5", options, overwrite=True).path]
    comparison = compare_scans(scans, names=["before", "after"])
    comparison.write(root / "demo-compare")
    lines.append(f"two checkpoints of the demo model, before and after a change (the {AFTER_CHANGE} circuit "
                 f"left out), compared into {root / 'demo-compare'}:")
    lines += ["  " + line for line in comparison.summary().splitlines()[:-1]]
    return lines


def _blocks(basis: torch.Tensor) -> dict[str, torch.Tensor]:
    """The side circuits' blocks: A, B halve subspace 6; C and D (15 dims) split the remainder. # -> [d, <=16] each"""
    first = 6 * SUB
    return {"A": basis[:, first:first + BLOCK], "B": basis[:, first + BLOCK:first + 2 * BLOCK],
            "C": basis[:, first + 2 * BLOCK:first + 3 * BLOCK], "D": basis[:, first + 3 * BLOCK:]}


def _share_D(blocks) -> float:
    """Block D's fixed share of each token's centred squared embedding norm: its natural share."""
    return blocks["D"].shape[1] / blocks["D"].shape[0]


def _fix_block_shares(wte: torch.Tensor, blocks) -> torch.Tensor:
    """Rescale each token's block-C and block-D components to fixed shares of its centred squared
    norm (``_SHARE_C``, ``_share_D``); directions and every other component are kept. # [V, d] -> [V, d]"""
    C, D = blocks["C"], blocks["D"]  # [d, 16], [d, 15]
    c, dd = wte @ C, wte @ D  # [V, 16], [V, 15]
    other = wte - wte.mean(1, keepdim=True) - c @ C.T - dd @ D.T  # [V, d] centred, C and D removed
    n2 = other.pow(2).sum(1, keepdim=True) / (1.0 - _SHARE_C - _share_D(blocks))  # [V, 1]
    c_new = c / c.norm(dim=1, keepdim=True) * (_SHARE_C * n2).sqrt()  # [V, 16]
    d_new = dd / dd.norm(dim=1, keepdim=True) * (_share_D(blocks) * n2).sqrt()  # [V, 15]
    return wte + (c_new - c) @ C.T + (d_new - dd) @ D.T  # [V, d]


def _plant_side_circuits(W_Q, W_K, W_V, W_O, blocks, g: torch.Generator, noise: float = 0.1) -> None:
    """Plant SIDE_CIRCUITS into the ``[L, H, d, dh]`` / ``[L, H, dh, d]`` weight tensors, in place."""
    d = W_Q.shape[2]

    def cols(*parts):  # blocks side by side, zero-padded to the head width: [d, SUB]
        out = torch.zeros(d, SUB, dtype=torch.float64)
        at = 0
        for scale, name in parts:
            out[:, at:at + blocks[name].shape[1]] = scale * blocks[name]
            at += blocks[name].shape[1]
        return out

    def plant(tensor, head, value):
        rms = float(value.norm()) / value.numel() ** 0.5
        tensor[head] = value + noise * rms * torch.randn(*value.shape, generator=g, dtype=torch.float64)

    A, B, D = ((1.0, "A"),), ((1.0, "B"),), ((1.0, "D"),)
    # writer 1.1: the token's block-A component, written into block B
    plant(W_V, (1, 1), cols(*A))
    plant(W_O, (1, 1), cols(*B).T)
    plant(W_Q, (2, 0), cols(*A))  # induction-like: query the token itself ...
    plant(W_K, (2, 0), cols(*B))  # ... against keys holding the written token
    plant(W_Q, (2, 1), cols(*B))  # the reverse: query the write ...
    plant(W_K, (2, 1), cols(*A))  # ... against the key token itself
    plant(W_V, (2, 2), cols(*B))  # copy-through: read the write ...
    plant(W_O, (2, 2), cols(*A).T)  # ... and write it back as the token's own component
    # writer 1.3: copies blocks C and D; lam makes its D write equal to the D component of the
    # write's projection on the token's unembedding direction (shares fixed by _fix_block_shares)
    lam = _SHARE_C / (1.0 - _share_D(blocks))
    plant(W_V, (1, 3), cols((1.0, "C"), (1.0, "D")))
    plant(W_O, (1, 3), cols((1.0, "C"), (lam, "D")).T)
    plant(W_Q, (2, 4), cols(*D))
    plant(W_K, (2, 4), cols(*D))


def _subspaces(gauss: torch.Tensor, d: int) -> torch.Tensor:
    """Orthonormal columns spanning the complement of the all-ones direction. # [d, d] -> [d, d-1]"""
    ones = torch.ones(d, 1, dtype=torch.float64) / d**0.5
    q, _ = torch.linalg.qr(torch.cat([ones, gauss[:, : d - 1]], 1))
    return q[:, 1:]


def _invented_words(n: int) -> list[str]:
    """``n`` distinct made-up words of two or three syllables, in a fixed order."""
    onsets, vowels = "bdfgklmnprstvz", "aeiou"
    syllables = [c + v for c in onsets for v in vowels]  # 70
    words = [a + b for a in syllables for b in syllables]  # 4900
    words += [a + b + c for a in syllables[:20] for b in syllables for c in syllables]
    return words[:n]

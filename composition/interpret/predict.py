"""From labels to predictions: compensation per pair (docs/methods.md §6) and the shortlist.

Three signs per pair ``(U, R)``: the writer's own effect on the written token's logit
``s_U`` (+1 copying, -1 suppressing: the writer's OV label, docs/methods.md §5), the responder's
response ``s_QK`` (+1 attention-raising, -1 attention-lowering: the pair's label,
docs/methods.md §4) and the responder's write ``s_R`` (+1 copying, -1 suppressing). When all three are
non-zero, ``s_U s_QK s_R < 0`` predicts that the responder works against what the writer
does to the token's logit (self-repair): **compensating**; ``> 0`` **reinforcing**. A
neutral sign on any of the three predicts nothing (**none**).

The shortlist names candidate **suppressor heads** (suppressing, and attention-raising
towards at least one writer) and **back-up heads** (copying, and attention-lowering towards
at least one writer), each with the writers it responds to.

Only a scan whose side feeds the prediction (the query side's full write, docs/methods.md §6; the
registry ``composition.compose.sides`` says which) gives signs, predictions and a shortlist;
every other scan's labels are reported in its side's own words, with its side's note.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..compose import sides
from .heads import HEAD_LABEL_WORDS, MODEL_SPACE_SCORES, HeadData
from ..store.scanfile import Scan
from ..score.stats import LABEL_NOT_COMPUTED

COMPENSATING, NONE, REINFORCING = -1, 0, 1
PREDICTION_WORDS = {COMPENSATING: "compensating", NONE: "none", REINFORCING: "reinforcing",
                    LABEL_NOT_COMPUTED: "not computed"}
RESPONSE_WORDS = {label: sides.get("query").words[label] for label in (1, -1, 0, LABEL_NOT_COMPUTED)}
READOUT_NOTE = ("this model has no LM head: its input embedding is taken as the readout, so copying and "
                "suppressing labels (and the predictions built on them) assume the embedding reads the logits.")
SHORTLIST_KINDS = {"suppressor": (+1, -1), "back-up": (-1, +1)}  # kind: (s_QK, s_R)


def compensation(pair_labels: np.ndarray, head_labels: np.ndarray) -> dict[str, np.ndarray]:
    """The three signs and the prediction of every pair.

    # pair_labels [L, H, L, H] int8 (+1/-1/0, LABEL_NOT_COMPUTED), head_labels [L, H] int8
    # -> {"s_writer", "s_response", "s_responder", "prediction"}: [L, H, L, H] int8
    ``prediction`` is -1 compensating, +1 reinforcing, 0 none, LABEL_NOT_COMPUTED where the
    pair was not scanned or a head has no profile.
    """
    pair_labels = np.asarray(pair_labels)
    head_labels = np.asarray(head_labels)
    L, H = head_labels.shape
    s_writer = np.broadcast_to(head_labels[:, :, None, None], (L, H, L, H)).astype(np.int8)
    s_responder = np.broadcast_to(head_labels[None, None, :, :], (L, H, L, H)).astype(np.int8)
    s_response = pair_labels.astype(np.int8)
    computed = ((s_response != LABEL_NOT_COMPUTED) & (s_writer != LABEL_NOT_COMPUTED)
                & (s_responder != LABEL_NOT_COMPUTED))
    product = np.where(computed, s_writer.astype(np.int64) * s_response * s_responder, 0)
    prediction = np.sign(product).astype(np.int8)
    prediction[~computed] = LABEL_NOT_COMPUTED
    return {"s_writer": s_writer, "s_response": s_response, "s_responder": s_responder,
            "prediction": prediction}


def readout_note(readout: str | None) -> str | None:
    """The sentence every output with copying/suppressing labels adds when the model has no LM head
    (``Weights.readout``, the scan attribute ``readout``)."""
    return READOUT_NOTE if readout == "input-embedding" else None


def side_notes(scan: Scan) -> list[str]:
    """What a scan's labels mean and whether they feed the prediction, and the readout note: one
    sentence each, for every output that shows the scan's labels."""
    side = sides.for_scan(scan.attrs)
    notes = [f"{side.title}: {side.words.meaning}", side.prediction_note]
    return notes + [n for n in (readout_note(scan.attrs.get("readout")),) if n]


def scan_compensation(scan: Scan, heads: HeadData) -> dict[str, np.ndarray]:
    """``compensation`` of a scan's labels where its side feeds the prediction (docs/methods.md §6); for any
    other side every sign of the response and every prediction is LABEL_NOT_COMPUTED.

    # -> {"s_writer", "s_response", "s_responder", "prediction"}: [L, H, L, H] int8
    """
    if sides.for_scan(scan.attrs).feeds_prediction:
        return compensation(scan.label, heads.heads["label"])
    return compensation(np.full(scan.label.shape, LABEL_NOT_COMPUTED, np.int8), heads.heads["label"])


def response_words(scan: Scan, labels: np.ndarray) -> np.ndarray:
    """Each label in the words of the scan's side. # labels [P] -> [P] str"""
    words = sides.for_scan(scan.attrs).words
    return np.array([words[int(v)] for v in np.asarray(labels).reshape(-1)])


def pair_table(scan: Scan, heads: HeadData | None = None) -> dict[str, np.ndarray]:
    """The scan's tidy table of computed pairs, extended with model-space scores, the three
    signs and the compensation prediction when head data is given (signs of the response and
    predictions only where the scan's side feeds them). # -> {column: [P]}"""
    table = scan.pairs()
    if heads is None:
        return table
    idx = np.argwhere(scan.done)  # [P, 4]
    sel = tuple(idx.T)
    ms = heads.model_space
    for name in MODEL_SPACE_SCORES:
        table[name] = ms[name][sel]
    for kind in ("q", "k", "v"):
        mean, sd = heads.baseline(kind)
        table[f"{kind}_composition_z"] = (ms[f"{kind}_composition"][sel] - mean) / sd
    comp = scan_compensation(scan, heads)
    for name, data in comp.items():
        table[name] = data[sel]
    table["prediction_word"] = np.array([PREDICTION_WORDS[int(v)] for v in table["prediction"]])
    table["response_word"] = response_words(scan, table["label"])
    return table


@dataclass
class Candidate:
    """One shortlisted head with the writers it responds to, strongest first."""

    kind: str  # "suppressor" or "back-up"
    head: tuple[int, int]
    ov_mean_percentile: float
    ov_q_value: float
    copying_score: float
    writers: list[dict] = field(default_factory=list)  # one dict of evidence per writer
    strength: float = 0.0

    @property
    def label(self) -> str:
        return f"{self.head[0]}.{self.head[1]}"


def shortlist(scan: Scan, heads: HeadData) -> list[Candidate]:
    """Candidate suppressor and back-up heads, ranked; none for a scan whose side does not feed
    the compensation prediction (its labels are not the responder's query response).

    Rank key: the smaller of the two effect sizes that put the head on the list, the
    head's own ``|OV mean percentile - 1/2|`` and the pair ``|mean percentile - 1/2|`` of its
    strongest writer (both must be large for a strong candidate); ties by q-value. Writer groups
    are writers like heads (named by their NAME; their OV sign from ``/group_heads``). When the
    scan holds references, writers are ranked by ``|above_generic|`` (ties by ``|random_z|``) and
    the pair's effect in the key is ``|above_generic|`` of the strongest writer: how far it goes
    beyond what the responder does with a generic write of the token (docs/groups.md §3).
    """
    if not sides.for_scan(scan.attrs).feeds_prediction:
        return []
    head_label = heads.heads["label"]  # [L, H]
    ov_mp = heads.heads["mean_percentile"]
    comp = compensation(scan.label, head_label)
    ms = heads.model_space
    ks = list(scan.k)
    groups = scan.groups.get("groups")
    group_ov = scan.groups.get("group_heads")
    referenced = scan.groups.get("references") is not None
    out: list[Candidate] = []
    for kind, (s_qk, s_r) in SHORTLIST_KINDS.items():
        for lR, hR in np.argwhere(head_label == s_r):
            idx = np.argwhere(scan.label[:, :, lR, hR] == s_qk)  # [n, 2] writers
            group_idx = (np.flatnonzero(groups["label"][:, lR, hR] == s_qk) if groups is not None
                         else np.zeros(0, dtype=np.int64))  # writer groups, as writers of their own
            if idx.size == 0 and group_idx.size == 0:
                continue
            cand = Candidate(kind, (int(lR), int(hR)), float(ov_mp[lR, hR]), float(heads.heads["q_value"][lR, hR]),
                             float(heads.heads["eigen_copying_score"][lR, hR]))
            for lU, hU in idx:
                i = (lU, hU, lR, hR)
                q_mean, q_sd = heads.baseline("q")
                cand.writers.append({
                    "writer": f"{lU}.{hU}",
                    **_pair_numbers(scan.arrays, i, ks),
                    "writer_ov": HEAD_LABEL_WORDS.get(int(head_label[lU, hU]), "not computed"),
                    "prediction": PREDICTION_WORDS[int(comp["prediction"][i])],
                    "q_composition": float(ms["q_composition"][i]),
                    "q_composition_z": float((ms["q_composition"][i] - q_mean) / q_sd),
                    "projection_kernel_q": float(ms["projection_kernel_q"][i]),
                    "kernel_random_mean_q": float(ms["kernel_random_mean_q"][i]),
                })
            for g in group_idx:
                s_writer = int(group_ov["label"][g]) if group_ov is not None else LABEL_NOT_COMPUTED
                signs = (s_writer, s_qk, s_r)
                prediction = (int(np.sign(s_writer * s_qk * s_r)) if LABEL_NOT_COMPUTED not in signs
                              else LABEL_NOT_COMPUTED)
                cand.writers.append({
                    "writer": scan.group_names[g],
                    **_pair_numbers(groups, (g, lR, hR), ks),
                    "writer_ov": HEAD_LABEL_WORDS.get(s_writer, "not computed"),
                    "prediction": PREDICTION_WORDS[prediction],
                    # model-space scores are defined for single heads only (docs/methods.md §7)
                    "q_composition": float("nan"), "q_composition_z": float("nan"),
                    "projection_kernel_q": float("nan"), "kernel_random_mean_q": float("nan"),
                })
            if referenced:  # docs/groups.md §3: how far each pair goes beyond a generic write of the token
                found = scan.standing(np.array([r["mean_percentile"] for r in cand.writers]),
                                      np.full(len(cand.writers), lR), np.full(len(cand.writers), hR))
                for j, r in enumerate(cand.writers):
                    r["above_generic"] = float(found["above_generic"][j])
                    r["random_z"] = float(found["random_z"][j])
                    r["outside_band"] = int(found["outside_band"][j])
                cand.writers.sort(key=lambda r: (-abs(r["above_generic"]), -abs(np.nan_to_num(r["random_z"])),
                                                 r["q_value"]))
                cand.strength = min(abs(cand.ov_mean_percentile - 0.5), abs(cand.writers[0]["above_generic"]))
            else:
                cand.writers.sort(key=lambda r: (-abs(r["mean_percentile"] - 0.5), r["q_value"]))
                cand.strength = min(abs(cand.ov_mean_percentile - 0.5),
                                    abs(cand.writers[0]["mean_percentile"] - 0.5))
            out.append(cand)
    out.sort(key=lambda c: (-c.strength, c.ov_q_value, c.head))
    return out


def _pair_numbers(arrays: dict, i: tuple, ks) -> dict:
    """A pair's (or group pair's) mean percentile, shares and q-value, for the shortlist."""
    return {"mean_percentile": float(arrays["mean_percentile"][i]),
            **{f"top_share_{k}": float(arrays["top_share"][i][j]) for j, k in enumerate(ks)},
            **{f"bottom_share_{k}": float(arrays["bottom_share"][i][j]) for j, k in enumerate(ks)},
            "q_value": float(arrays["q_value"][i])}


def shortlist_rows(candidates: list[Candidate]) -> list[dict]:
    """One flat row per (candidate, writer), for CSV files and notebooks."""
    rows = []
    for rank, c in enumerate(candidates, 1):
        for r in c.writers:
            rows.append({"rank": rank, "kind": c.kind, "head": c.label,
                         "head_ov": HEAD_LABEL_WORDS[-1 if c.kind == "suppressor" else 1],
                         "ov_mean_percentile": c.ov_mean_percentile, "ov_q_value": c.ov_q_value,
                         "copying_score": c.copying_score, **r})
    return rows


def pair_prediction(scan: Scan, heads: HeadData, writer: tuple[int, int], responder: tuple[int, int]) -> dict:
    """The scan's label in its side's words, the three signs and the prediction of one pair (the
    prediction is "not computed" where the scan's side does not feed it)."""
    i = (*writer, *responder)
    comp = scan_compensation(scan, heads)
    return {"response": sides.for_scan(scan.attrs).words[int(scan.label[i])],
            "q_value": float(scan.q_value[i]),
            "s_writer": int(comp["s_writer"][i]), "s_response": int(comp["s_response"][i]),
            "s_responder": int(comp["s_responder"][i]),
            "prediction": PREDICTION_WORDS[int(comp["prediction"][i])]}


def mediation_rows(full, parts: dict) -> list[dict]:
    """How much of each labelled query-side pair survives in each mediation part (docs/methods.md §3b).

    ``full`` is the query-side scan of the whole write, ``parts`` maps ``unembed``/``rest``
    to the scans of those parts (same checkpoint and selection). One row per pair labelled on
    the full write: its top-k share (bottom-k for attention-lowering pairs, k the largest of
    the scan) in the full write and in each part, and the fraction of the write's squared
    norm each part carries. Rank statistics are blind to magnitude: read a part's share
    beside its write fraction.
    """
    from ..errors import CompositionError

    for name, part in parts.items():
        a = part.attrs
        if a.get("side", "query") != "query" or name not in ("unembed", "rest") or a.get("query_part") != name:
            raise CompositionError(f"{part.path} is not a scan of a query part (--query-part unembed or rest).")
        if a.get("weights_fingerprint") != full.attrs.get("weights_fingerprint"):
            raise CompositionError(f"{part.path} was computed from other weights than {full.path}.")
    k = int(full.k[-1])
    rows = []
    for ix in np.argwhere((full.label == 1) | (full.label == -1)):
        ix = tuple(int(i) for i in ix)
        which = "top_share" if full.label[ix] == 1 else "bottom_share"
        row = {"writer": f"{ix[0]}.{ix[1]}", "responder": f"{ix[2]}.{ix[3]}",
               "response": RESPONSE_WORDS[int(full.label[ix])], "share": f"{which.split('_')[0]}-{k}",
               "full": float(getattr(full, which)[ix][-1])}
        for name, part in parts.items():
            done = bool(part.done[ix])
            row[name] = float(getattr(part, which)[ix][-1]) if done else float("nan")
            row[f"{name}_write_fraction"] = float(part.write_fraction[ix]) if done else float("nan")
        rows.append(row)
    return rows

"""Token text for reports: a checkpoint's ``tokenizer.json`` read as plain JSON.

No tokenizer library is used: the vocabulary (``model.vocab`` as a ``{text: id}`` object or
a list of ``[text, score]`` pairs, plus ``added_tokens``) is read from the JSON, and
byte-level pieces are shown as the text they stand for. The byte-to-character table of
byte-level vocabularies is the one published with GPT-2 (Radford et al. 2019, the
``bytes_to_unicode`` table of its released encoder): printable Latin-1 bytes map to
themselves, the other bytes to the characters from U+0100 upwards, in byte order.
Pieces of SentencePiece-style vocabularies mark a leading space with U+2581.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

from ..errors import CompositionError

TOKENIZER_NAME = "tokenizer.json"


@dataclass(frozen=True)
class Vocabulary:
    """Token id -> raw piece and display text; ``None`` pieces are ids the file does not name."""

    pieces: tuple[str | None, ...]
    byte_level: bool
    source: str

    def text(self, token_id: int) -> str:
        """The token as readable text, or ``#id`` when the file does not name it."""
        piece = self.pieces[token_id] if 0 <= token_id < len(self.pieces) else None
        if piece is None:
            return f"#{token_id}"
        return _decode_bytes(piece) if self.byte_level else piece.replace("\u2581", " ")

    def lookup(self, item: str) -> int | None:
        """Id of a token given as its raw piece or its display text (None if unknown)."""
        index = self.__dict__.get("_index")
        if index is None:
            index = {}
            for i, piece in enumerate(self.pieces):
                if piece is not None:
                    index.setdefault(piece, i)
                    index.setdefault(self.text(i), i)
            object.__setattr__(self, "_index", index)
        return index.get(item)


def load_vocabulary(directory: str | os.PathLike, size: int) -> Vocabulary | None:
    """The vocabulary of ``directory/tokenizer.json`` for ``size`` token ids; None if absent."""
    path = Path(directory) / TOKENIZER_NAME
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CompositionError(f"{path} is not readable JSON ({str(exc).splitlines()[0]}).") from None
    model = data.get("model") if isinstance(data, dict) else None
    vocab = model.get("vocab") if isinstance(model, dict) else None
    pieces: list[str | None] = [None] * size
    if isinstance(vocab, dict):
        for text, i in vocab.items():
            if isinstance(i, int) and 0 <= i < size:
                pieces[i] = text
    elif isinstance(vocab, list):
        for i, entry in enumerate(vocab[:size]):
            pieces[i] = entry[0] if isinstance(entry, list) and entry else None
    else:
        raise CompositionError(f"{path} has no model.vocab table of token pieces.")
    for added in data.get("added_tokens") or []:
        if isinstance(added, dict) and isinstance(added.get("id"), int) and 0 <= added["id"] < size:
            pieces[added["id"]] = str(added.get("content"))
    return Vocabulary(tuple(pieces), _is_byte_level(data), str(path))


def checkpoint_directory(checkpoint: str | os.PathLike) -> Path:
    """The directory that holds a checkpoint's files."""
    p = Path(checkpoint)
    return p if p.is_dir() else p.parent


def _is_byte_level(data: dict) -> bool:
    def kinds(node):
        if isinstance(node, dict):
            yield node.get("type")
            for key in ("pretokenizers", "decoders"):
                for child in node.get(key) or []:
                    yield from kinds(child)

    return any(k == "ByteLevel" for part in ("decoder", "pre_tokenizer") for k in kinds(data.get(part)))


def _byte_table() -> dict[str, int]:
    """Character -> byte of the GPT-2 byte-level alphabet."""
    keep = list(range(ord("!"), ord("~") + 1)) + list(range(0xA1, 0xAC + 1)) + list(range(0xAE, 0xFF + 1))
    chars, extra = {}, 0
    for b in range(256):
        if b in keep:
            chars[chr(b)] = b
        else:
            chars[chr(256 + extra)] = b
            extra += 1
    return chars


_BYTES = _byte_table()


def _decode_bytes(piece: str) -> str:
    if not all(c in _BYTES for c in piece):
        return piece
    return bytes(_BYTES[c] for c in piece).decode("utf-8", errors="replace")

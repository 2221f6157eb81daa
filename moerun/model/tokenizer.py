"""The model's byte-level BPE tokenizer (``tokenizer.json``, read with the tokenizers library)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from moerun.errors import BadInput, BadModelFile
from moerun.files.fileio import read_user_file

TOKENIZER_LIMIT = 256 << 20  # bytes of a tokenizer.json (large published vocabularies take about 10-20 MB)
CHUNK_CHARS = 4096  # long texts are encoded in pieces of about this many characters (see Tokenizer.encode)


def _pieces_are_exact(doc: dict) -> bool:
    """Whether encoding a text piece by piece, cut before a space between two non-space characters, gives the
    ids of encoding it whole: true for byte-level BPE with the regex pre-tokenizer, no normalizer and no prefix
    space (the space then always opens the next pre-token; common practice, no source; tests check it)."""
    pre = doc.get("pre_tokenizer") or {}
    model = doc.get("model") or {}
    return (
        doc.get("normalizer") is None
        and pre.get("type") == "ByteLevel"
        and pre.get("use_regex", True) is True
        and pre.get("add_prefix_space") is False
        and model.get("type") == "BPE"
        and not model.get("dropout")
        and not doc.get("added_tokens_decoder")
    )


def text_problem(text: str) -> str | None:
    """Why ``text`` cannot be encoded as UTF-8 (undecodable bytes carried as surrogates), or None."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as e:
        return f"not valid UTF-8 text (character {e.start})"
    return None


class Tokenizer:
    def __init__(self, path: Path, vocab_size: int, bos_token_id: int | None):
        raw = read_user_file(path, BadModelFile, "tokenizer file", limit=TOKENIZER_LIMIT, missing=f"{path}: missing")
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as e:
            raise BadModelFile(f"{path}: not UTF-8 text (bad byte at offset {e.start})") from None
        try:
            from tokenizers import Tokenizer as _Tok

            self._tok = _Tok.from_str(text)
        except Exception as e:  # the library raises plain Exceptions for malformed files
            first = str(e).splitlines()[0] if str(e) else type(e).__name__
            raise BadModelFile(f"{path}: not a usable tokenizer ({first[:160]})") from None
        n = self._tok.get_vocab_size(with_added_tokens=True)
        if n > vocab_size:
            raise BadModelFile(f"{path}: tokenizer has {n} tokens but the model's vocab_size is {vocab_size}")
        self.bos = bos_token_id
        try:
            self._exact_pieces = _pieces_are_exact(json.loads(text))
        except (ValueError, RecursionError, AttributeError):
            self._exact_pieces = False

    @property
    def vocab_size(self) -> int:
        return self._tok.get_vocab_size(with_added_tokens=True)

    @classmethod
    def load(cls, model_dir: Path, vocab_size: int, bos_token_id: int | None) -> Tokenizer:
        return cls(Path(model_dir) / "tokenizer.json", vocab_size, bos_token_id)

    def encode(self, text: str, bos: bool = True) -> list[int]:
        """Token ids of ``text`` (with the bos token first, if the model has one and ``bos``).

        A long text is encoded in pieces of about CHUNK_CHARS characters, cut only where the ids cannot
        change (``_pieces_are_exact``): the library's per-token bookkeeping for a whole book would otherwise
        take hundreds of bytes per token, outside any memory cap.
        """
        problem = text_problem(text)
        if problem:
            raise BadInput(f"the text is {problem}")
        ids: list[int] = []
        for piece in self._pieces(text):
            ids.extend(self._tok.encode(piece, add_special_tokens=False).ids)
        if bos and self.bos is not None:
            ids = [self.bos] + ids
        return ids

    def encode_array(self, text: str, limit: int | None = None) -> np.ndarray:
        """The ids of ``text`` (no bos) as an int32 array, stopping after ``limit`` tokens: 4 bytes per token
        instead of a Python list's 36, and a long text's tail beyond the limit is never encoded."""
        problem = text_problem(text)
        if problem:
            raise BadInput(f"the text is {problem}")
        parts: list[np.ndarray] = []
        n = 0
        for piece in self._pieces(text):
            if limit is not None and n >= limit:
                break
            a = np.asarray(self._tok.encode(piece, add_special_tokens=False).ids, np.int32)
            parts.append(a)
            n += a.size
        ids = np.concatenate(parts) if parts else np.zeros(0, np.int32)
        return ids if limit is None else ids[:limit]

    def _pieces(self, text: str):
        if not self._exact_pieces or len(text) <= CHUNK_CHARS:
            yield text
            return
        start, n = 0, len(text)
        while n - start > CHUNK_CHARS:
            cut = _last_cut(text, start + 1, start + CHUNK_CHARS)
            if cut is None:
                cut = _first_cut(text, start + CHUNK_CHARS, n)
                if cut is None:
                    break
            yield text[start:cut]
            start = cut
        yield text[start:]

    def decode(self, ids) -> str:
        return self._tok.decode([int(i) for i in ids], skip_special_tokens=True)


def _cuttable(text: str, i: int) -> bool:
    """A space between two non-space characters: the next pre-token starts here whatever surrounds it."""
    return 0 < i < len(text) - 1 and not text[i - 1].isspace() and not text[i + 1].isspace()


def _last_cut(text: str, lo: int, hi: int) -> int | None:
    i = text.rfind(" ", lo, hi)
    while i != -1 and not _cuttable(text, i):
        i = text.rfind(" ", lo, i)
    return None if i == -1 else i


def _first_cut(text: str, lo: int, hi: int) -> int | None:
    i = text.find(" ", lo, hi)
    while i != -1 and not _cuttable(text, i):
        i = text.find(" ", i + 1, hi)
    return None if i == -1 else i


def read_text_file(path: str | Path) -> str:
    """Read a UTF-8 text file for the user (a regular file, at most fileio.TEXT_LIMIT bytes); one clear error otherwise."""
    path = Path(path)
    data = read_user_file(path, BadInput, "file")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise BadInput(f"{path}: not UTF-8 text (bad byte at offset {e.start})") from None

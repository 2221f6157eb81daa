"""The model's byte-level BPE tokenizer (``tokenizer.json``, read with the tokenizers library)."""

from __future__ import annotations

import codecs
import json
import os
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np

from moerun.errors import BadInput, BadModelFile, BadOption
from moerun.files.fileio import TEXT_LIMIT, open_regular, read_user_file

TOKENIZER_LIMIT = 256 << 20  # bytes of a tokenizer.json (large published vocabularies take about 10-20 MB)
CHUNK_CHARS = 4096  # long texts are encoded in pieces of about this many characters (see Tokenizer.encode)
READ_BYTES = 1 << 16  # a text file is read and decoded this many bytes at a time (read_text_chunks)


def _pieces_are_exact(doc: dict) -> bool:
    """Whether encoding a text piece by piece, cut before a space between two non-space characters, gives the
    ids of encoding it whole: true for byte-level BPE with the regex pre-tokenizer, no normalizer and no prefix
    space (the space then always opens the next pre-token; common practice, no source; tests check it).  An added
    token holding a space could straddle such a cut: a tokenizer with one is encoded whole."""
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
        and not any(any(ch.isspace() for ch in str(t.get("content", ""))) for t in doc.get("added_tokens") or [])
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
        self.longest_token_bytes = self._longest_token_bytes() if self._exact_pieces else None

    def _longest_token_bytes(self) -> int | None:
        """The most bytes of text one token stands for, from the vocabulary: a byte-level token's characters
        are one byte each (the ByteLevel alphabet); an added token is its content, matched in the text as
        it is written.  A text of B bytes therefore has at least B / this many tokens, provided every byte
        has a token (else a byte could vanish: None, no bound)."""
        from tokenizers import pre_tokenizers

        vocab = self._tok.get_vocab(with_added_tokens=False)
        if not all(ch in vocab for ch in pre_tokenizers.ByteLevel.alphabet()):
            return None
        added = {t.content for t in self._tok.get_added_tokens_decoder().values()}
        byte_level = (len(t) for t in vocab if t not in added)
        return max(max(byte_level, default=1), max((len(a.encode("utf-8")) for a in added), default=1))

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
        return self._collect(self._stream(_str_chunks(text)), limit)

    def encode_file(self, path: str | os.PathLike, limit: int | None = None) -> np.ndarray:
        """The ids of a UTF-8 text file (no bos) as an int32 array: the ids of ``encode_array`` on its whole
        text, but read ``READ_BYTES`` at a time and only as far as the first ``limit`` tokens need (the file
        is read up to the first place where the text can be cut after them).  Memory: 4 bytes a token kept,
        plus the text not yet cut (a few pieces; all of a run without a cuttable space)."""
        return self._collect(self._stream(read_text_chunks(path)), limit)

    @staticmethod
    def _collect(stream, limit: int | None) -> np.ndarray:
        parts: list[np.ndarray] = []
        n = 0
        try:
            for ids, _ in stream:
                parts.append(ids)
                n += ids.size
                if limit is not None and n >= limit:
                    break
        finally:
            stream.close()
        ids = np.concatenate(parts) if parts else np.zeros(0, np.int32)
        return ids if limit is None else ids[:limit]

    def encode_prompt(self, text: str | None = None, context: int = 0, *, path: str | os.PathLike | None = None,
                      bos: bool = True) -> tuple[str, list[int]]:
        """A prompt's text and ids (bos first), which must fit ``context`` tokens: ``text``, or the UTF-8 file
        at ``path``, read and encoded only as far as needed to know.

        BadOption as soon as the count passes the context: "N tokens exceed the model's context of C" when the
        whole text was encoded, "at least N tokens ..." when it stopped early.  N also counts, for the text not
        yet cut into pieces, its characters divided by ``longest_token_bytes`` (a token covers at most that
        many bytes, a character at least one), so a run without spaces is refused without encoding it.
        """
        kept: list[str] = []

        def keep(chunks):
            for chunk in chunks:
                kept.append(chunk)
                yield chunk

        chunks = read_text_chunks(path) if path is not None else _str_chunks(text or "")
        head = [self.bos] if bos and self.bos is not None else []
        parts: list[np.ndarray] = []
        n = len(head)
        longest = self.longest_token_bytes
        stream = self._stream(keep(chunks))
        try:
            for ids, pending in stream:
                parts.append(ids)
                n += ids.size
                least = n + (-(-pending // longest) if longest and pending else 0)
                if least > context:
                    some = "" if pending == 0 else "at least "  # pending is 0 only once the whole text is encoded
                    raise BadOption(f"{some}{least} tokens exceed the model's context of {context}")
        finally:
            stream.close()
            chunks.close()
        ids = head + (np.concatenate(parts).tolist() if parts else [])
        return ("".join(kept) if path is not None else (text or "")), ids

    def _stream(self, chunks: Iterable[str]) -> Iterator[tuple[np.ndarray, int]]:
        """Encode a text given in successive chunks: yields (int32 ids, characters given but not yet encoded)
        after each chunk, then once more for the rest (0 characters left: only then).

        The ids are exactly those of encoding the whole text: the text is cut only where ``_pieces`` would cut
        it (a space between two non-space characters), the last such place in the text given so far, and what
        lies before it is encoded in ``_pieces``.  A tokenizer that cannot be cut (``_pieces_are_exact``) gets
        the whole text at the end.
        """
        empty = np.zeros(0, np.int32)
        start = end = 0  # character offsets: the text from start to end is given but not encoded
        pending: list[str] = []
        tail = ""  # the last two characters given
        for chunk in chunks:
            if not chunk:
                continue
            problem = text_problem(chunk)
            if problem:
                raise BadInput(f"the text is {_shift(problem, end)}")
            pending.append(chunk)
            if not self._exact_pieces:
                end += len(chunk)
                yield empty, end - start
                continue
            window = tail + chunk  # cuts at end - 1 .. need the characters on both sides
            base = end - len(tail)
            cut = _last_cut(window, max(1, len(tail) - 1), len(window))
            end += len(chunk)
            tail = window[-2:]
            ids = empty
            if cut is not None and base + cut > start:
                text = "".join(pending)
                k = base + cut - start
                pending = [text[k:]]
                start = base + cut
                ids = self._encode_pieces(text[:k])
            yield ids, end - start
        yield self._encode_pieces("".join(pending)), 0

    def _encode_pieces(self, text: str) -> np.ndarray:
        parts = [np.asarray(self._tok.encode(piece, add_special_tokens=False).ids, np.int32) for piece in self._pieces(text)]
        return np.concatenate(parts) if parts else np.zeros(0, np.int32)

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


def _shift(problem: str, offset: int) -> str:
    """text_problem's message for a chunk that starts ``offset`` characters into the text."""
    head, _, rest = problem.rpartition("(character ")
    return f"{head}(character {int(rest.rstrip(')')) + offset})" if head else problem


def _str_chunks(text: str, size: int = READ_BYTES) -> Iterator[str]:
    for i in range(0, len(text), size):
        yield text[i : i + size]


def read_text_chunks(path: str | os.PathLike, limit: int = TEXT_LIMIT) -> Iterator[str]:
    """The text of a UTF-8 file the user named (a regular file, at most ``limit`` bytes), ``READ_BYTES`` at a
    time: what is read is checked as it is decoded, and a reader that stops early never reads the rest.

    Errors are read_text_file's (one line, BadInput), with the offset of a bad byte counted from the start
    of the file; a character cut between two reads is decoded whole.
    """
    path = Path(path)
    decoder = codecs.getincrementaldecoder("utf-8")("strict")
    with open_regular(path, BadInput, "file", limit=limit) as f:
        total = 0
        while True:
            try:
                data = f.read(READ_BYTES)
            except OSError as e:
                raise BadInput(f"{path}: cannot read ({e.strerror or e})") from None
            held = len(decoder.getstate()[0])
            try:
                text = decoder.decode(data, final=not data)
            except UnicodeDecodeError as e:
                raise BadInput(f"{path}: not UTF-8 text (bad byte at offset {total - held + e.start})") from None
            total += len(data)
            if total > limit:  # it grew while being read
                raise BadInput(f"{path}: more than the {limit:,} bytes a file may hold")
            if text:
                yield text
            if not data:
                return


def read_text_file(path: str | Path) -> str:
    """Read a UTF-8 text file for the user (a regular file, at most fileio.TEXT_LIMIT bytes); one clear error otherwise."""
    path = Path(path)
    data = read_user_file(path, BadInput, "file")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise BadInput(f"{path}: not UTF-8 text (bad byte at offset {e.start})") from None

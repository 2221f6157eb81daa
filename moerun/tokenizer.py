"""The model's byte-level BPE tokenizer (``tokenizer.json``, read with the tokenizers library)."""

from __future__ import annotations

from pathlib import Path

from .errors import BadInput, BadModelFile


class Tokenizer:
    def __init__(self, path: Path, vocab_size: int, bos_token_id: int | None):
        try:
            from tokenizers import Tokenizer as _Tok

            self._tok = _Tok.from_file(str(path))
        except FileNotFoundError:
            raise BadModelFile(f"{path}: missing") from None
        except Exception as e:  # the library raises plain Exceptions for malformed files
            first = str(e).splitlines()[0] if str(e) else type(e).__name__
            raise BadModelFile(f"{path}: not a usable tokenizer ({first[:160]})") from None
        n = self._tok.get_vocab_size(with_added_tokens=True)
        if n > vocab_size:
            raise BadModelFile(f"{path}: tokenizer has {n} tokens but the model's vocab_size is {vocab_size}")
        self.bos = bos_token_id

    @classmethod
    def load(cls, model_dir: Path, vocab_size: int, bos_token_id: int | None) -> Tokenizer:
        return cls(Path(model_dir) / "tokenizer.json", vocab_size, bos_token_id)

    def encode(self, text: str, bos: bool = True) -> list[int]:
        ids = self._tok.encode(text, add_special_tokens=False).ids
        if bos and self.bos is not None:
            ids = [self.bos] + ids
        return ids

    def decode(self, ids) -> str:
        return self._tok.decode([int(i) for i in ids], skip_special_tokens=True)


def read_text_file(path: str | Path) -> str:
    """Read a UTF-8 text file for the user; one clear error otherwise."""
    from .fileio import read_user_file

    path = Path(path)
    data = read_user_file(path, BadInput, "file")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise BadInput(f"{path}: not UTF-8 text (bad byte at offset {e.start})") from None

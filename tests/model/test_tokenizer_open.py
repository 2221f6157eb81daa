"""The tokenizers of open checkpoints: moerun encodes and decodes exactly as the tokenizers library does.

Outside reference: the tokenizers library (0.23), which runs every tokenizer.json.  The tokenizer built here has
the parts published byte-level BPE vocabularies of about 150,000 tokens use: an NFC normalizer, a regex split
before a byte-level pre-tokenizer, merges, and added special tokens.  Its split pattern is the one such
vocabularies publish (written here from memory); its merges are learned by the library's own BPE trainer on
an invented text.
"""

from __future__ import annotations

import json

import pytest
from tokenizers import Regex, Tokenizer, decoders, models, normalizers, pre_tokenizers, trainers

from moerun.model.tokenizer import Tokenizer as MoerunTokenizer
from moerun.model.tokenizer import _pieces_are_exact

SPLIT = (r"(?i:'s|'t|'re|'ve|'m|'ll|'d)|[^\r\n\p{L}\p{N}]?\p{L}+|\p{N}| ?[^\s\p{L}\p{N}]+[\r\n]*|\s*[\r\n]+|\s+(?!\S)|\s+")
CORPUS = [
    "The keepers check the mesh at dawn; the fog comes in from the ridge.",
    "Yield on day 132: 41.5 litres, mesh 4 drip rate 0.8 ml/min. Ärger mit dem Netz? Non, ça va.",
    "Cycle 19 — 霧の網 — 安全第一. Emoji 🌫️ and tabs\tand\nnew lines\r\n",
] * 20
SPECIALS = ["<|fin|>", "<|turn|>"]


@pytest.fixture(scope="module")
def tokenizer_file(tmp_path_factory):
    tok = Tokenizer(models.BPE())
    tok.normalizer = normalizers.NFC()
    tok.pre_tokenizer = pre_tokenizers.Sequence([
        pre_tokenizers.Split(Regex(SPLIT), behavior="isolated"),
        pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=False),
    ])
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(vocab_size=600, special_tokens=SPECIALS, initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
                                  show_progress=False)
    tok.train_from_iterator(CORPUS, trainer)
    path = tmp_path_factory.mktemp("tok") / "tokenizer.json"
    path.write_text(tok.to_str())
    return path


TEXTS = [
    "The keepers check the mesh at dawn.",
    "Ärger? ça va. 霧の網 🌫️ 41.5 litres\n\n  indented\tline<|fin|>after",
    "<|turn|>special first, then  two spaces and trailing space ",
    "e\u0301 composed by NFC, and an already composed \u00e9",
    "",
]


def test_a_regex_split_vocabulary_is_encoded_whole_not_in_pieces(tokenizer_file):
    doc = json.loads(tokenizer_file.read_text())
    assert _pieces_are_exact(doc) is False  # the piecewise shortcut is proven only for a plain byte-level split


@pytest.mark.parametrize("text", TEXTS)
def test_ids_and_text_are_the_librarys(tokenizer_file, text):
    lib = Tokenizer.from_file(str(tokenizer_file))
    ours = MoerunTokenizer(tokenizer_file, vocab_size=1000, bos_token_id=None)
    want = lib.encode(text, add_special_tokens=False).ids
    assert ours.encode(text, bos=False) == want
    assert ours.encode_array(text).tolist() == want
    assert ours.decode(want) == lib.decode(want, skip_special_tokens=True)


def test_a_long_text_is_encoded_as_the_library_encodes_it_whole(tokenizer_file, tmp_path):
    lib = Tokenizer.from_file(str(tokenizer_file))
    ours = MoerunTokenizer(tokenizer_file, vocab_size=1000, bos_token_id=None)
    text = " ".join(CORPUS) * 5
    f = tmp_path / "t.txt"
    f.write_text(text, encoding="utf-8")
    want = lib.encode(text, add_special_tokens=False).ids
    assert ours.encode_file(f).tolist() == want
    assert ours.encode_file(f, limit=50).tolist() == want[:50]


def test_streamed_text_never_splits_a_multi_byte_character(tokenizer_file):
    """What `moerun generate` prints as tokens arrive (moerun/cli/commands/generate.py): the decoded text so far,
    held back while it ends in an incomplete UTF-8 sequence; the pieces joined are the whole decode."""
    lib = Tokenizer.from_file(str(tokenizer_file))
    ids = lib.encode("霧の網 🌫️ ça va", add_special_tokens=False).ids
    byte_ids = [lib.token_to_id(ch) for ch in "".join(lib.id_to_token(i) for i in ids)]  # one byte per token
    ours = MoerunTokenizer(tokenizer_file, vocab_size=1000, bos_token_id=None)
    shown, pieces = "", []
    for n in range(1, len(byte_ids) + 1):
        text = ours.decode(byte_ids[:n])
        if text.endswith("\ufffd"):
            continue
        pieces.append(text[len(shown):])
        shown = text
    assert all("\ufffd" not in p for p in pieces)
    assert "".join(pieces) == ours.decode(byte_ids) == "霧の網 🌫️ ça va"
    assert len(pieces) < len(byte_ids)  # some bytes were held back: the text has multi-byte characters

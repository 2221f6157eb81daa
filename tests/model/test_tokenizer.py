"""moerun.model.tokenizer: byte-level tokenizers round-trip any text; broken files and non-UTF-8 input fail clearly."""

from __future__ import annotations

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from moerun.errors import BadInput, BadModelFile
from moerun.files.config import ModelConfig
from moerun.model.tokenizer import Tokenizer, read_text_file

TEXTS = [
    "plain ASCII text, with punctuation!",
    "Grüße aus Köln — naïve café, déjà vu",
    "日本語のテキストと中文",
    "emoji 🦔🚀 and combining e\u0301",
    "  leading spaces, tabs\tand\nnewlines\n",
    "",
]


def _load(model_dir) -> Tokenizer:
    c = ModelConfig.load(model_dir)
    return Tokenizer.load(model_dir, c.vocab_size, c.bos_token_id)


@pytest.fixture(scope="module")
def byte_tok(small_model) -> Tokenizer:
    return _load(small_model)


@pytest.fixture(scope="module")
def pebble_tok(pebble) -> Tokenizer:
    if not (pebble / "tokenizer.json").is_file():
        pytest.skip("bundled tokenizer tiny_models/pebble/tokenizer.json is absent")
    return _load(pebble)


@pytest.mark.parametrize("text", TEXTS)
def test_synthetic_byte_tokenizer_round_trips_non_ascii_text(byte_tok, text):
    ids = byte_tok.encode(text)
    assert ids[0] == 0  # <doc> first: the synthetic config's bos_token_id
    assert byte_tok.decode(ids) == text


def test_synthetic_byte_tokenizer_spends_one_token_per_utf8_byte(byte_tok):
    text = "Grüße 🦔"
    assert len(byte_tok.encode(text, bos=False)) == len(text.encode("utf-8"))


@settings(max_examples=30, deadline=None)
@given(text=st.text(max_size=40))
def test_synthetic_byte_tokenizer_round_trips_any_text(byte_tok, text):
    assert byte_tok.decode(byte_tok.encode(text)) == text


@pytest.mark.parametrize("text", TEXTS)
def test_bundled_tokenizer_round_trips_non_ascii_text(pebble_tok, text):
    ids = pebble_tok.encode(text)
    assert pebble_tok.decode(ids) == text


def test_bundled_tokenizer_ids_lie_inside_the_vocabulary(pebble, pebble_tok):
    vocab = ModelConfig.load(pebble).vocab_size
    ids = pebble_tok.encode(" ".join(TEXTS))
    assert ids and 0 <= min(ids) and max(ids) < vocab


def test_broken_tokenizer_json_raises_bad_model_file(fresh_model):
    (fresh_model / "tokenizer.json").write_text('{"model": {"type": "BPE", "vocab": ')
    with pytest.raises(BadModelFile, match="not a usable tokenizer"):
        _load(fresh_model)


def test_missing_tokenizer_json_raises_bad_model_file(fresh_model):
    (fresh_model / "tokenizer.json").unlink()
    with pytest.raises(BadModelFile, match="missing"):
        _load(fresh_model)


def test_tokenizer_larger_than_the_model_vocabulary_is_refused(fresh_model):
    with pytest.raises(BadModelFile, match="vocab_size"):
        Tokenizer.load(fresh_model, 100, 0)


def test_read_text_file_refuses_non_utf8_bytes_naming_the_offset(tmp_path):
    p = tmp_path / "prompt.txt"
    p.write_bytes(b"ok so far \xff\xfe then junk")
    with pytest.raises(BadInput, match="offset 10"):
        read_text_file(p)


def test_read_text_file_returns_utf8_text(tmp_path):
    p = tmp_path / "prompt.txt"
    p.write_text("Grüße 🦔", encoding="utf-8")
    assert read_text_file(p) == "Grüße 🦔"


def test_read_text_file_refuses_missing_file_and_directory(tmp_path):
    with pytest.raises(BadInput, match="no such file"):
        read_text_file(tmp_path / "absent.txt")
    with pytest.raises(BadInput, match="directory"):
        read_text_file(tmp_path)


def test_tokenizer_json_that_is_valid_json_but_not_a_tokenizer_is_refused(fresh_model):
    (fresh_model / "tokenizer.json").write_text(json.dumps({"hello": "world"}))
    with pytest.raises(BadModelFile):
        _load(fresh_model)


# ---------------------------------------------------------------------------- undecodable text, hostile files, long texts


def test_text_that_is_not_utf8_is_refused_by_the_tokenizer_with_bad_input(byte_tok):
    # what Python makes of the byte 0xff on a command line or in a file name (surrogateescape, PEP 383)
    for text in ("caf\udce9", "\udcff", "ok \ud800 lone surrogate"):
        with pytest.raises(BadInput, match="UTF-8"):
            byte_tok.encode(text)
        with pytest.raises(BadInput, match="UTF-8"):
            byte_tok.encode_array(text)


def test_a_tokenizer_file_that_is_not_utf8_is_a_bad_model_file(small_model, tmp_path):
    import shutil

    d = tmp_path / "m"
    shutil.copytree(small_model, d)
    (d / "tokenizer.json").write_bytes(b'{"version": "1.0", "model": "\xff\xfe"}')
    with pytest.raises(BadModelFile, match="UTF-8"):
        _load(d)


def test_a_fifo_in_place_of_tokenizer_json_is_refused_at_once(small_model, tmp_path):
    import shutil

    from conftest import fifo

    d = tmp_path / "m"
    shutil.copytree(small_model, d)
    (d / "tokenizer.json").unlink()
    fifo(d / "tokenizer.json")
    with pytest.raises(BadModelFile, match="FIFO"):
        _load(d)


def test_a_long_text_encodes_in_pieces_to_exactly_the_ids_of_encoding_it_whole(pebble_tok, pebble):
    from tokenizers import Tokenizer as LibraryTokenizer

    whole = LibraryTokenizer.from_file(str(pebble / "tokenizer.json"))
    text = (pebble / "heldout.txt").read_text(encoding="utf-8")
    assert len(text) > 10 * 4096  # many pieces
    want = whole.encode(text, add_special_tokens=False).ids
    assert pebble_tok.encode(text, bos=False) == want
    assert pebble_tok.encode_array(text).tolist() == want
    assert pebble_tok.encode_array(text, 1000).tolist() == want[:1000]


@settings(max_examples=60, deadline=None)
@given(words=st.lists(st.text(st.characters(blacklist_categories=("Cs",)), max_size=12), min_size=1, max_size=800),
       seps=st.lists(st.sampled_from([" ", "  ", "\n", " \n", "\t", "", ". "]), min_size=1, max_size=800))
def test_pieces_give_the_ids_of_the_whole_text_for_any_text(pebble_tok, pebble, words, seps):
    from tokenizers import Tokenizer as LibraryTokenizer

    whole = LibraryTokenizer.from_file(str(pebble / "tokenizer.json"))
    text = "".join(w + seps[i % len(seps)] for i, w in enumerate(words)) * 3
    assert pebble_tok.encode(text, bos=False) == whole.encode(text, add_special_tokens=False).ids


# ---------------------------------------------------------------------------- texts read and encoded in pieces, only as far as needed


def _byte_level_bytes(token: str) -> int:
    """The bytes a byte-level vocabulary entry stands for: one per character of the ByteLevel alphabet."""
    from tokenizers import pre_tokenizers

    alphabet = set(pre_tokenizers.ByteLevel.alphabet())
    assert set(token) <= alphabet
    return len(token)


def _whole(model_dir):
    from tokenizers import Tokenizer as LibraryTokenizer

    return LibraryTokenizer.from_file(str(model_dir / "tokenizer.json"))


@pytest.mark.parametrize("which", ["byte", "pebble"])
def test_the_longest_token_bound_comes_from_the_vocabulary(request, which):
    tok = request.getfixturevalue(f"{which}_tok")
    added = {t.content for t in tok._tok.get_added_tokens_decoder().values()}
    want = max([_byte_level_bytes(t) for t in tok._tok.get_vocab(with_added_tokens=False) if t not in added]
               + [len(a.encode("utf-8")) for a in added])
    assert tok.longest_token_bytes == want
    # the text that comes closest to the bound: the longest tokens' own bytes, over and over
    from tokenizers import decoders

    longest = max((t for t in tok._tok.get_vocab(with_added_tokens=False) if t not in added), key=len)
    raw = decoders.ByteLevel().decode([longest]).encode("utf-8", "surrogatepass")
    for text in ((raw * 50).decode("utf-8", "replace"), "<doc>" * 50):
        n = len(tok.encode(text, bos=False))
        assert n * tok.longest_token_bytes >= len(text.encode("utf-8"))


TRICKY = ["Grüße aus Köln — naïve café", "日本語のテキスト", "🦔🚀 e\u0301", "<doc>", " ", "  ", "\n", "\t", ". ", "x" * 300,
          "stone", "river's", "1234", "don't", "\u00a0", "a b", "-" * 90]


@pytest.mark.parametrize("which", ["byte", "pebble"])
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(words=st.lists(st.one_of(st.sampled_from(TRICKY), st.text(st.characters(blacklist_categories=("Cs",)), max_size=9)),
                      min_size=1, max_size=400),
       size=st.integers(1, 700))
def test_a_text_given_in_chunks_encodes_to_exactly_the_ids_of_encoding_it_whole(request, which, words, size):
    # chunks of any size, cutting multi-byte characters' neighbours, spaces and words anywhere; the pieces
    # the stream cuts are its own, and the ids must still be those of the library on the whole text
    from moerun.model import tokenizer as module

    tok = request.getfixturevalue(f"{which}_tok")
    model_dir = request.getfixturevalue("small_model" if which == "byte" else "pebble")
    text = " ".join(words)
    want = _whole(model_dir).encode(text, add_special_tokens=False).ids
    assert tok._collect(tok._stream(module._str_chunks(text, size)), None).tolist() == want
    assert tok.encode_array(text).tolist() == want
    # a token covers at most longest_token_bytes bytes: the bound the prompt check relies on
    assert len(want) * tok.longest_token_bytes >= len(text.encode("utf-8"))


def test_a_file_read_in_chunks_encodes_to_the_ids_of_its_whole_text(pebble_tok, pebble, tmp_path, monkeypatch):
    from moerun.model import tokenizer as module

    text = (pebble / "heldout.txt").read_text(encoding="utf-8")[:30000] + " Grüße 日本語 🦔 " * 200
    p = tmp_path / "t.txt"
    p.write_text(text, encoding="utf-8")
    want = _whole(pebble).encode(text, add_special_tokens=False).ids
    for read_bytes in (1, 2, 3, 5, 4096):  # reads that cut two-, three- and four-byte characters
        monkeypatch.setattr(module, "READ_BYTES", read_bytes)
        assert "".join(module.read_text_chunks(p)) == text
        assert pebble_tok.encode_file(p).tolist() == want
        assert pebble_tok.encode_file(p, 777).tolist() == want[:777]


@pytest.mark.parametrize("read_bytes", [1, 3, 4, 64, 1 << 16])
def test_a_bad_byte_is_named_at_its_offset_in_the_file_whatever_the_reads(tmp_path, monkeypatch, read_bytes):
    from moerun.model import tokenizer as module

    monkeypatch.setattr(module, "READ_BYTES", read_bytes)
    p = tmp_path / "t.txt"
    p.write_bytes("Grüße ".encode() * 3 + b"ok \xc3(" + b" tail")  # 24 good bytes, a cut sequence at 27
    with pytest.raises(BadInput, match="bad byte at offset 27"):
        list(module.read_text_chunks(p))
    p.write_bytes("日本".encode() + b"\xe6\x97")  # a character cut by the end of the file
    with pytest.raises(BadInput, match="bad byte at offset 6"):
        list(module.read_text_chunks(p))


def test_a_prompt_that_fits_gives_the_ids_of_encode_and_one_that_does_not_is_refused(byte_tok, tmp_path):
    from moerun.errors import BadOption

    assert byte_tok.encode_prompt("abc de", 16) == ("abc de", byte_tok.encode("abc de"))
    assert byte_tok.encode_prompt("", 16) == ("", byte_tok.encode(""))
    p = tmp_path / "p.txt"
    p.write_text("Grüße 🦔", encoding="utf-8")
    assert byte_tok.encode_prompt(context=64, path=p) == ("Grüße 🦔", byte_tok.encode("Grüße 🦔"))
    with pytest.raises(BadOption, match="^17 tokens exceed the model's context of 16$"):  # all of it encoded: exact
        byte_tok.encode_prompt("x" * 16, 16)
    with pytest.raises(BadOption, match="^at least [0-9]+ tokens exceed the model's context of 16$"):
        byte_tok.encode_prompt("x" * 100_000, 16)


def test_a_prompt_without_spaces_is_refused_by_the_byte_bound_without_encoding_it(byte_tok, monkeypatch):
    from moerun.errors import BadOption

    calls = []
    real = byte_tok._encode_pieces
    monkeypatch.setattr(byte_tok, "_encode_pieces", lambda text: calls.append(len(text)) or real(text))
    with pytest.raises(BadOption, match="at least"):
        byte_tok.encode_prompt("y" * 5_000_000, 256)
    assert calls == []  # one run with no place to cut: the bound alone refused it

"""moerun.model.tokenizer: byte-level tokenizers round-trip any text; broken files and non-UTF-8 input fail clearly."""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
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

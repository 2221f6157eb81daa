"""``moerun <command>``: argument parsing, shared options, and the one place errors become exit codes.

Exit codes (docs/guide/hardening.md): 0 success, 1 a check failed, 2 bad input or
usage, 130 interrupted (Ctrl-C), 143 terminated (SIGTERM).  Library errors (``MoerunError``) become one line on
stderr; nothing prints a traceback for a user mistake.
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
import sys

from moerun._version import __version__
from moerun.errors import EXIT_INTERRUPTED, EXIT_TERMINATED, BadInput, BadOption, MoerunError, OutputError, Terminated
from moerun.files.bundled import DEFAULT, bundled_models, resolve_model
from moerun.runtime.guesses import AUTO_GUESSES

# This module imports nothing that imports numpy at its top: entry() chooses the BLAS threads before
# numpy loads (the console script and ``python -m moerun`` import this module, then call entry()).
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")

COMMANDS = ["generate", "verify", "inspect", "probe", "synth", "record", "profile", "replay", "quantize", "score", "plan"]


class ArgParser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit 2."""

    def error(self, message: str):  # noqa: D401
        sys.stderr.write(f"moerun: {message} (see '{self.prog} --help')\n")
        raise SystemExit(2)


# ---------------------------------------------------------------------- shared options


def model_value(text: str) -> str:
    """--model: a directory, or a bundled model's short name, which becomes that model's directory
    (moerun.files.bundled.resolve_model); anything else is passed on as it was written."""
    found = resolve_model(text)
    return str(found) if found.is_absolute() and not os.path.isabs(text) else text


def add_model(p) -> None:
    names = ", ".join(bundled_models()) or "none found"
    p.add_argument("--model", metavar="DIR", type=model_value,
                   help=f"model directory, or the name of a bundled model ({names}; default: {DEFAULT})")


def whole_number_at_least(flag: str, low: int):
    """An argparse type for ``flag``: a whole number, ``low`` or more; a usage error (one line, exit 2) otherwise."""

    def parse(text: str) -> int:
        try:
            n = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{flag} takes a whole number, got {text!r}") from None
        if n < low:
            raise argparse.ArgumentTypeError(f"{flag} must be {low} or more, got {n}")
        return n

    return parse


seed_value = whole_number_at_least("--seed", 0)  # numpy's generators refuse negative seeds


def add_seed(p, what: str = "sampling seed") -> None:
    """--seed, one parser for every command that takes one (seed_value)."""
    p.add_argument("--seed", type=seed_value, default=0, metavar="N", help=f"{what}, 0 or more (default 0)")


def add_max_tokens(p, help: str) -> None:
    """--max-tokens (default: all of the text), one parser for score, record and quantize."""
    p.add_argument("--max-tokens", type=whole_number_at_least("--max-tokens", 1), metavar="N", help=help)


def add_prompt(p, max_new_default: int = 80) -> None:
    g = p.add_mutually_exclusive_group()
    g.add_argument("--prompt", metavar="TEXT", help="prompt text")
    g.add_argument("--prompt-file", metavar="FILE", help="read the prompt from a UTF-8 file")
    p.add_argument("--max-new", type=int, default=max_new_default, metavar="N", help=f"tokens to generate (default {max_new_default})")
    add_seed(p)
    p.add_argument("--temperature", type=float, default=0.8, metavar="T", help="0 = greedy (default 0.8)")
    p.add_argument("--top-p", type=float, default=0.95, metavar="P", help="nucleus sampling mass (default 0.95)")


class LazyHelp(str):
    """An option's help made only when ``--help`` prints it (argparse formats a help with ``%``): the list of
    installed policies reads the packages' metadata, which no other run needs (moerun.policies.listing)."""

    def __new__(cls, make):
        text = super().__new__(cls, "(see --help)")
        text.make = make
        return text

    def __mod__(self, params):
        return self.make()


def prefetch_setting(text: str):
    """--prefetch's value: ``auto`` or a whole number of guesses per layer (its range is checked with the others)."""
    if text == "auto":
        return "auto"
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected auto or a whole number of guesses, got {text!r}") from None


def add_memory(p, prefetch="auto") -> None:
    """The engine's memory options; ``prefetch`` is --prefetch's default (a check that compares runs passes 0)."""
    from moerun import policies

    p.add_argument("--mem-cap", metavar="SIZE", help="memory cap for dense weights + KV cache + scratch + expert pool (48MiB, 1.5GB, bytes); default: every expert resident")
    p.add_argument("--slots", metavar="N,N,...", help="expert slots per layer, overriding the even split of the cap (not with --shared-pool)")
    p.add_argument("--shared-pool", action="store_true", help="one pool shared by all layers instead of per-layer quotas")
    p.add_argument("--evict", default="lru", metavar="POLICY",
                   help=LazyHelp(lambda: f"eviction policy: {policies.listing(online_only=True)} (default lru)"))
    p.add_argument("--prefetch", type=prefetch_setting, default=prefetch, metavar="N|auto",
                   help="speculative guesses per layer: 0 = off, N (at most the experts per layer), or auto: "
                        f"{AUTO_GUESSES} guesses where the pool cannot hold every expert, each layer's kept only while "
                        f"they save more wait than they cost (default {prefetch})")
    p.add_argument("--lookahead", type=int, default=None, metavar="L", help="layers ahead to guess, with --prefetch (default 1)")
    p.add_argument("--prefetch-from", choices=("attention", "output"), default=None,
                   help="prefetch point, with --prefetch: after a layer's attention (default; more time to hide a read) or after the whole layer (better guesses)")
    p.add_argument("--link-speed", metavar="RATE", help="emulate a slower link for page-in, e.g. 2GB/s (labelled emulated)")
    p.add_argument("--cold", action="store_true", help="drop the model file from the OS page cache first")
    p.add_argument("--max-context", type=int, metavar="N",
                   help="positions the KV cache holds, and so the longest prompt plus output (default: the model's "
                        "context; an open checkpoint's, at most 4096)")
    p.add_argument("--expert-slots", choices=("auto", "stored", "float32"), default="auto",
                   help="how an open checkpoint's BF16/F16 experts are held: as stored (half the bytes, widened at each "
                        "use) or as float32 (widened once when read); auto: float32 when every expert is resident and "
                        "nothing is prefetched, else as stored")
    p.add_argument("--dense-weights", choices=("float32", "stored"), default="float32",
                   help="an open checkpoint's dense matrices (attention, lm_head, shared experts): widened to float32 "
                        "once (default), or kept as stored and widened at each use (half their memory, slower)")
    p.set_defaults(_engine_cap=True)  # --mem-cap caps the engine: the out-of-memory line may point at it


def add_force(p, what: str = "the output") -> None:
    p.add_argument("--force", action="store_true",
                   help=f"replace {what} if it exists (never a device, FIFO, link, foreign directory or an input of the run)")


def add_force_dir(p, also: str = "") -> None:
    """--force for a command whose output is a model directory (moerun.files.fileio.atomic_dir's rules)."""
    p.add_argument("--force", action="store_true",
                   help=f"replace OUT if it is a model directory (never one holding other files{also})")


# ---------------------------------------------------------------------------- one rule for options that contradict


def _flag(name: str) -> str:
    return "--" + name.replace("_", "-")


def _given(args, name: str) -> bool:
    """Whether the user gave an option: its value is not None (False, 0) -- the "not given" defaults."""
    v = getattr(args, name, None)
    return v is not None and v is not False and not (name == "prefetch" and v == 0)


def refuse_without(args, option: str, required: str, how: str = "") -> None:
    """OPTION means nothing unless REQUIRED is given: refused (one rule for every command, docs/guide/hardening.md)."""
    if _given(args, option) and not _given(args, required):
        raise BadOption(f"{_flag(option)} has no effect without {how or _flag(required)}; drop it or add {_flag(required)}")


def refuse_together(args, a: str, b: str, why: str) -> None:
    """Options that contradict each other: refused, naming both."""
    if _given(args, a) and _given(args, b):
        raise BadOption(f"{_flag(a)} and {_flag(b)} contradict each other ({why}); give one")


def check_memory_options(args) -> None:
    refuse_together(args, "slots", "shared_pool", "--slots sets per-layer quotas, --shared-pool one pool for every layer")
    refuse_without(args, "lookahead", "prefetch", "--prefetch N (N > 0)")
    refuse_without(args, "prefetch_from", "prefetch", "--prefetch N (N > 0)")


def check_against_model(args, config) -> None:
    """The memory options that only the model can refute: more guesses than experts, guesses past the last layer."""
    from moerun.runtime.options import check_against_config

    check_against_config(getattr(args, "prefetch", 0), getattr(args, "lookahead", None), config)


# ---------------------------------------------------------------------------- one spelling per direction

# A routing trace the command reads is ``--routing FILE`` in every command; a trace the command writes is
# ``--trace FILE``.  Spellings replaced for this rule still work for one release, with a note on stderr.


def add_routing(p, help: str) -> None:
    """--routing FILE: a routing trace the command reads (the one spelling of an input trace)."""
    p.add_argument("--routing", metavar="FILE", help=help)


def deprecated(command: str, old: str, new: str) -> None:
    """One line on stderr: an old spelling still works for this release; say what to write instead."""
    sys.stderr.write(f"moerun {command}: note: {old} is deprecated and goes in the next release; write {new}\n")


def routing_from_old(args, command: str, old_dest: str, old: str) -> None:
    """Fold an old spelling of the input trace (in ``old_dest``) into ``args.routing``, with the deprecation note;
    both spellings at once are refused (BadOption, exit 2)."""
    value = getattr(args, old_dest, None)
    if value is None:
        return
    if args.routing is not None:
        raise BadOption(f"the trace to read was given twice ({old} and --routing FILE); give it once, as --routing FILE")
    deprecated(command, old, "--routing FILE")
    args.routing = value


def add_json(p) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout and nothing else there")


def parse_slot_list(text: str | None) -> list[int] | None:
    from moerun.runtime.options import parse_slot_list as parse

    return parse(text)


def engine_kwargs(args) -> dict:
    check_memory_options(args)
    return {
        "model_dir": args.model,
        "mem_cap": args.mem_cap,
        "evict": args.evict,
        "prefetch": args.prefetch,
        "lookahead": args.lookahead if args.lookahead is not None else 1,
        "prefetch_from": args.prefetch_from or "attention",
        "slots": parse_slot_list(args.slots),
        "split": "shared" if args.shared_pool else "even",
        "link_speed": args.link_speed,
        "cold": args.cold,
        "max_context": args.max_context,
        "expert_slots": args.expert_slots,
        "dense_weights": args.dense_weights,
    }


def model_files(model_dir) -> list:
    """Every file of a model directory: a run's inputs, which no output may replace."""


    d = resolve_model(model_dir)
    try:
        return [p for p in d.iterdir() if p.is_file()]
    except OSError:
        return []


def check_prompt_file(args) -> None:
    """A --prompt-file that is missing, not a regular file or too large: refused before the model loads."""
    from moerun.files.fileio import TEXT_LIMIT, open_regular

    if getattr(args, "prompt_file", None):
        open_regular(args.prompt_file, BadInput, "file", limit=TEXT_LIMIT).close()


def read_prompt(args, tokenizer, context: int) -> tuple[str, list[int]]:
    """The prompt's text and ids (--prompt or --prompt-file), read and encoded only as far as ``context``
    tokens reach: a prompt that does not fit is refused (BadOption) without reading or encoding it whole."""
    if getattr(args, "prompt_file", None):
        return tokenizer.encode_prompt(context=context, path=args.prompt_file)
    return tokenizer.encode_prompt(args.prompt if args.prompt is not None else "", context)


# ---------------------------------------------------------------------- main


def build_parser() -> ArgParser:
    parser = ArgParser(prog="moerun", description="CPU reference engine and workbench for offloaded mixture-of-experts inference")
    parser.add_argument("--version", action="version", version=f"moerun {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=ArgParser)
    for name in COMMANDS:
        try:
            mod = importlib.import_module(f"moerun.cli.commands.{name}")
        except ModuleNotFoundError as e:
            if e.name and e.name.endswith(f"commands.{name}"):
                continue
            raise
        p = sub.add_parser(name, help=mod.HELP, description=mod.HELP)
        mod.add_arguments(p)
        p.set_defaults(func=mod.run, _parser=p)
    return parser


class StdoutError(OutputError):
    """Standard output refused our text: closed (a pipe whose reader left) or full (/dev/full, a full disk)."""


class StdoutClosed(StdoutError):
    """Standard output's reader went away (``moerun generate | head -3``): the command ends quietly, with the
    exit status of a process ended by SIGPIPE, as the tools of a pipeline do (128 + 13)."""

    exit_code = 141


class _GuardedStdout:
    """Standard output whose write and flush failures become StdoutError, so cli.main reports them in one line."""

    def __init__(self, stream):
        self._stream = stream

    def _failed(self, e: OSError):
        if isinstance(e, BrokenPipeError):
            return StdoutClosed("standard output was closed by its reader")
        return StdoutError(f"cannot write to standard output ({e.strerror or e}); output stopped")

    def write(self, text: str) -> int:
        try:
            return self._stream.write(text)
        except OSError as e:
            raise self._failed(e) from None

    def flush(self) -> None:
        try:
            self._stream.flush()
        except OSError as e:
            raise self._failed(e) from None

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _silence_stdout(stream) -> None:
    """After a failed write: point file descriptor 1 at /dev/null so the interpreter's last flush cannot fail again."""
    try:
        if stream.fileno() == 1:
            fd = os.open(os.devnull, os.O_WRONLY)
            os.dup2(fd, 1)
            os.close(fd)
    except (OSError, ValueError, AttributeError):
        pass


def check_text_arguments(args, parser) -> None:
    """Every argument must be valid UTF-8 (the shell may pass any bytes; they would reach the tokenizer or the output)."""
    for dest, value in vars(args).items():
        if not isinstance(value, str):
            continue
        bad = next((i for i, ch in enumerate(value) if "\udc80" <= ch <= "\udcff"), None)  # undecodable bytes (surrogateescape)
        if bad is None:
            try:
                value.encode("utf-8")
            except UnicodeEncodeError as e:
                bad = e.start
        if bad is not None:
            offset = len(value[:bad].encode("utf-8", "surrogateescape"))
            byte = ord(value[bad]) - 0xDC00 if "\udc80" <= value[bad] <= "\udcff" else None
            what = f"byte 0x{byte:02x}" if byte is not None else "a lone surrogate"
            raise BadInput(f"{_option_name(parser, args, dest)}: not valid UTF-8 text ({what} at offset {offset})")


def _option_name(parser, args, dest: str) -> str:
    sub = getattr(args, "_parser", None)
    for action in getattr(sub, "_actions", []):
        if action.dest == dest:
            return action.option_strings[0] if action.option_strings else (action.metavar or dest.upper())
    return _flag(dest)


def main(argv: list[str] | None = None) -> int:
    if sys.stdout is None:  # file descriptor 1 was closed when the process started
        sys.stderr.write("moerun: standard output is closed; run with an open standard output (> /dev/null to discard it)\n")
        return 2
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    real_stdout = sys.stdout
    sys.stdout = _GuardedStdout(real_stdout)
    try:
        check_text_arguments(args, parser)
        with _numeric_warnings_off():
            code = int(args.func(args) or 0)
        sys.stdout.flush()
        return code
    except MoerunError as e:
        if isinstance(e, StdoutError):
            _silence_stdout(real_stdout)
        if not isinstance(e, StdoutClosed):  # the reader left on purpose: nothing to say
            sys.stderr.write(f"moerun {args.command}: {e}\n")
        return e.exit_code
    except MemoryError as e:  # e.g. a config whose context needs a KV cache larger than the machine
        detail = str(e).splitlines()[0][:200] if str(e) else "allocation failed"
        # the hint only where --mem-cap is the engine's cap (plan's plans for a budget; replay has none)
        hint = "; --mem-cap checks the budget before the run" if getattr(args, "_engine_cap", False) else ""
        sys.stderr.write(f"moerun {args.command}: out of memory ({detail}){hint}\n")
        return 2
    except KeyboardInterrupt as e:
        return _stopped(e, args.command)
    except Exception as e:
        # Ctrl-C landing inside a library call can surface as another error raised while the
        # KeyboardInterrupt unwound (numpy's savez closing a half-written zip raises ValueError):
        # that is still an interruption, not a crash
        cause = _raised_while_interrupted(e)
        if cause is None:
            raise
        return _stopped(cause, args.command)
    finally:
        sys.stdout = real_stdout


def _numeric_warnings_off():
    """numpy's RuntimeWarnings (overflow, invalid value) are not shown: a non-finite result is caught by the
    engine's one check (Engine._finite) and reported as one line; a warning before it would be a second.
    Warnings the library gives on purpose (a stalled prefetch reader, say) are one line on stderr."""
    import contextlib
    import warnings

    import numpy as np

    stack = contextlib.ExitStack()
    stack.enter_context(np.errstate(all="ignore"))
    stack.enter_context(warnings.catch_warnings())
    warnings.simplefilter("ignore", RuntimeWarning)
    warnings.showwarning = lambda message, category, *rest, **kw: sys.stderr.write(f"moerun: warning: {message}\n")
    return stack


def _raised_while_interrupted(e: BaseException) -> KeyboardInterrupt | None:
    """The interruption (Ctrl-C or SIGTERM) this error was raised while unwinding, if any."""
    seen = set()
    cur: BaseException | None = e
    while cur is not None and id(cur) not in seen:
        if isinstance(cur, KeyboardInterrupt):
            return cur
        seen.add(id(cur))
        cur = cur.__cause__ or cur.__context__
    return None


def _stopped(e: KeyboardInterrupt, command: str | None) -> int:
    """One line for a command stopped by Ctrl-C (exit 130) or SIGTERM (exit 143)."""
    who = f"moerun {command}" if command else "moerun"
    if isinstance(e, Terminated):
        sys.stderr.write(f"\n{who}: terminated\n")
        return EXIT_TERMINATED
    sys.stderr.write(f"\n{who}: interrupted\n")
    return EXIT_INTERRUPTED


def one_blas_thread() -> None:
    """The command line's choice of BLAS threads, made before numpy loads: one, unless the environment says.

    Batch-1 decode multiplies small matrices: one BLAS thread is faster and far steadier than two on a
    shared 2-core machine (DEVELOPERS.md, Benchmarks).  Importing moerun as a library changes no
    environment variable: a program chooses for itself (docs/guide/api.md, "BLAS threads").
    """
    for var in BLAS_THREAD_VARIABLES:
        os.environ.setdefault(var, "1")


def run_process(stopping: list) -> None:
    """The rest of the process entry point (``moerun.cli.entry``, which installed the signal handlers: the
    first SIGINT raises KeyboardInterrupt, the first SIGTERM ``Terminated``, later ones are ignored while
    that one unwinds, so a command's clean-up runs to the end)."""
    try:
        one_blas_thread()  # first: the commands import numpy only after this
        code = main()
    except KeyboardInterrupt as e:  # before a command started
        code = _stopped(e, None)
    except Exception as e:  # numpy's import turns an interruption inside it into an ImportError
        cause = _raised_while_interrupted(e)
        if cause is None and stopping:  # the chain was cut (a C extension's import), but a signal came
            cause = Terminated() if stopping[0] == signal.SIGTERM else KeyboardInterrupt()
        if cause is None:
            raise
        code = _stopped(cause, None)
    if code in (EXIT_INTERRUPTED, EXIT_TERMINATED) or stopping:
        # the command has stopped; a signal now would only interrupt the interpreter's shutdown:
        # let it end the process at once, as the signal does by default
        for signum in (signal.SIGINT, signal.SIGTERM):
            if signal.getsignal(signum) != signal.SIG_IGN:
                signal.signal(signum, signal.SIG_DFL)
    if sys.stdout is not None:
        try:
            sys.stdout.flush()
        except OSError as e:
            _silence_stdout(sys.stdout)
            if code == 0 and isinstance(e, BrokenPipeError):
                code = StdoutClosed.exit_code
            elif code == 0:
                sys.stderr.write("moerun: cannot write to standard output\n")
                code = 2
    raise SystemExit(code)

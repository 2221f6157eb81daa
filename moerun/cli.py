"""``moerun <command>``: argument parsing, shared options, and the one place errors become exit codes.

Exit codes (DESIGN section 4): 0 success, 1 a check failed, 2 bad input or
usage, 130 interrupted.  Library errors (``MoerunError``) become one line on
stderr; nothing prints a traceback for a user mistake.
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
import sys

from .errors import BadOption, MoerunError

COMMANDS = ["generate", "verify", "inspect", "probe", "synth", "record", "replay", "quantize", "score", "plan"]


class ArgParser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit 2."""

    def error(self, message: str):  # noqa: D401
        sys.stderr.write(f"moerun: {message} (see '{self.prog} --help')\n")
        raise SystemExit(2)


# ---------------------------------------------------------------------- shared options


def add_model(p) -> None:
    p.add_argument("--model", metavar="DIR", help="model directory (default: the bundled tiny model)")


def seed_value(text: str) -> int:
    """argparse type for --seed: a whole number, 0 or more (numpy's generators refuse negative seeds)."""
    try:
        seed = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--seed takes a whole number, got {text!r}") from None
    if seed < 0:
        raise argparse.ArgumentTypeError(f"--seed must be 0 or more, got {seed}")
    return seed


def add_prompt(p, max_new_default: int = 80) -> None:
    g = p.add_mutually_exclusive_group()
    g.add_argument("--prompt", metavar="TEXT", help="prompt text")
    g.add_argument("--prompt-file", metavar="FILE", help="read the prompt from a UTF-8 file")
    p.add_argument("--max-new", type=int, default=max_new_default, metavar="N", help=f"tokens to generate (default {max_new_default})")
    p.add_argument("--seed", type=seed_value, default=0, metavar="N", help="sampling seed, 0 or more (default 0)")
    p.add_argument("--temperature", type=float, default=0.8, metavar="T", help="0 = greedy (default 0.8)")
    p.add_argument("--top-p", type=float, default=0.95, metavar="P", help="nucleus sampling mass (default 0.95)")


def add_memory(p) -> None:
    p.add_argument("--mem-cap", metavar="SIZE", help="memory cap for dense weights + KV cache + scratch + expert pool (48MiB, 1.5GB, bytes); default: every expert resident")
    p.add_argument("--slots", metavar="N,N,...", help="expert slots per layer, overriding the even split of the cap")
    p.add_argument("--shared-pool", action="store_true", help="one pool shared by all layers instead of per-layer quotas")
    p.add_argument("--evict", default="lru", metavar="POLICY", help="eviction policy: lru (default), lfu, fifo, ...")
    p.add_argument("--prefetch", type=int, default=0, metavar="N", help="speculative guesses per layer (0 = off)")
    p.add_argument("--lookahead", type=int, default=1, metavar="L", help="layers ahead to guess (default 1)")
    p.add_argument("--prefetch-from", choices=("attention", "output"), default="attention",
                   help="prefetch point: after a layer's attention (default; more time to hide a read) or after the whole layer (better guesses)")
    p.add_argument("--link-speed", metavar="RATE", help="emulate a slower link for page-in, e.g. 2GB/s (labelled emulated)")
    p.add_argument("--cold", action="store_true", help="drop the model file from the OS page cache first")


def add_json(p) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout and nothing else there")


def parse_slots(text: str | None) -> list[int] | None:
    if text is None:
        return None
    try:
        slots = [int(s) for s in text.split(",") if s.strip()]
    except ValueError:
        raise BadOption(f"--slots takes whole numbers separated by commas, got {text!r}") from None
    if not slots:
        raise BadOption("--slots is empty")
    return slots


def engine_kwargs(args) -> dict:
    return {
        "model_dir": args.model,
        "mem_cap": args.mem_cap,
        "evict": args.evict,
        "prefetch": args.prefetch,
        "lookahead": args.lookahead,
        "prefetch_from": args.prefetch_from,
        "slots": parse_slots(args.slots),
        "split": "shared" if args.shared_pool else "even",
        "link_speed": args.link_speed,
        "cold": args.cold,
    }


def read_prompt(args) -> str:
    if getattr(args, "prompt_file", None):
        from .tokenizer import read_text_file

        return read_text_file(args.prompt_file)
    return args.prompt if args.prompt is not None else ""


# ---------------------------------------------------------------------- main


def build_parser() -> ArgParser:
    parser = ArgParser(prog="moerun", description="CPU reference engine and workbench for offloaded mixture-of-experts inference")
    from . import __version__

    parser.add_argument("--version", action="version", version=f"moerun {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=ArgParser)
    for name in COMMANDS:
        try:
            mod = importlib.import_module(f".commands.{name}", __package__)
        except ModuleNotFoundError as e:
            if e.name and e.name.endswith(f"commands.{name}"):
                continue
            raise
        p = sub.add_parser(name, help=mod.HELP, description=mod.HELP)
        mod.add_arguments(p)
        p.set_defaults(func=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args.func(args) or 0)
    except MoerunError as e:
        sys.stderr.write(f"moerun {args.command}: {e}\n")
        return e.exit_code
    except MemoryError as e:  # e.g. a config whose context needs a KV cache larger than the machine
        detail = str(e).splitlines()[0][:200] if str(e) else "allocation failed"
        sys.stderr.write(f"moerun {args.command}: out of memory ({detail}); --mem-cap checks the budget before the run\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(f"\nmoerun {args.command}: interrupted\n")
        return 130
    except BrokenPipeError:
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 1
    except Exception as e:
        # Ctrl-C landing inside a library call can surface as another error raised while the
        # KeyboardInterrupt unwound (numpy's savez closing a half-written zip raises ValueError):
        # that is still an interruption, not a crash
        if not _raised_while_interrupted(e):
            raise
        sys.stderr.write(f"\nmoerun {args.command}: interrupted\n")
        return 130


def _raised_while_interrupted(e: BaseException) -> bool:
    seen = set()
    cur: BaseException | None = e
    while cur is not None and id(cur) not in seen:
        if isinstance(cur, KeyboardInterrupt):
            return True
        seen.add(id(cur))
        cur = cur.__cause__ or cur.__context__
    return False


def _first_ctrl_c_only(interrupted: list) -> None:
    """SIGINT raises KeyboardInterrupt once; later ones are ignored while that one unwinds.

    The first Ctrl-C stops the command, whose clean-up (stopping the prefetch reader process, at most a
    couple of seconds; writing a partial trace; removing temporary files) must run to the end: a
    second Ctrl-C landing inside it would leave temporary files or print a traceback from inside a
    library.  Only the process entry point installs this, never ``main()`` (which tests call).
    """

    def on_sigint(signum, frame):
        if interrupted:
            return
        interrupted.append(signum)
        raise KeyboardInterrupt

    signal.signal(signal.SIGINT, on_sigint)


def entry() -> None:
    if hasattr(signal, "SIGPIPE"):
        pass
    interrupted: list = []
    try:
        _first_ctrl_c_only(interrupted)
        code = main()
    except KeyboardInterrupt:  # Ctrl-C before a command started
        sys.stderr.write("\nmoerun: interrupted\n")
        code = 130
    if code == 130 or interrupted:
        # the command has stopped; a Ctrl-C now would only interrupt the interpreter's shutdown:
        # let it end the process at once, as SIGINT does by default
        signal.signal(signal.SIGINT, signal.SIG_DFL)
    sys.stdout.flush()
    raise SystemExit(code)

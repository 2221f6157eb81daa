"""moerun generate: stream text from the model under a memory cap, then a run summary."""

from __future__ import annotations

import sys
from pathlib import Path

from .. import cli
from ..engine import load
from ..errors import BadInput, BadOption
from ..report import emit_json
from ..sampling import Sampling
from ..summary import model_note, run_json, run_text
from ..trace import write_trace

HELP = "generate text under a memory cap and report speed, hits, stalls and memory"


def add_arguments(p) -> None:
    cli.add_model(p)
    cli.add_prompt(p)
    cli.add_memory(p)
    p.add_argument("--trace", metavar="FILE", help="write every routing decision and page-in event to FILE (.npz)")
    cli.add_json(p)


def run(args) -> int:
    if args.max_new < 0:  # refuse before loading the model or echoing the prompt
        raise BadOption(f"--max-new must be zero or more, got {args.max_new}")
    if args.trace and Path(args.trace).is_dir():
        raise BadInput(f"--trace {args.trace}: is a directory, expected a file name")
    prompt = cli.read_prompt(args)
    sampling = Sampling(args.temperature, args.top_p, args.seed)
    engine = load(**cli.engine_kwargs(args))
    stream = not args.json
    printed = ""
    new: list[int] = []

    def on_token(tok: int) -> None:
        nonlocal printed
        new.append(tok)
        if not stream:
            return
        text = engine.tokenizer.decode(new)
        if text.endswith("\ufffd"):  # an incomplete UTF-8 sequence; wait for the next token
            return
        sys.stdout.write(text[len(printed) :])
        sys.stdout.flush()
        printed = text

    with engine:
        if args.trace:
            engine.start_trace()
        partial = True
        try:
            if stream:
                sys.stdout.write(prompt)
            gen = engine.generate(prompt, max_new=args.max_new, sampling=sampling, on_token=on_token)
            partial = False
        finally:
            if args.trace and engine.recorder is not None:
                try:
                    write_trace(args.trace, engine.finish_trace(partial=partial, extra={"text": "generate"}))
                except OSError as e:
                    where = f": {e.filename}" if e.filename else ""
                    raise BadInput(f"--trace {args.trace}: cannot write ({e.strerror or e}{where})") from None
        if args.json:
            doc = {"prompt": prompt, "text": gen.text, "note": model_note(engine.config), **run_json(engine, gen)}
            if args.trace:
                doc["trace"] = args.trace
            emit_json(doc)
        else:
            if stream:
                sys.stdout.write(gen.text[len(printed) :])
            sys.stdout.write(f"\n\n[{model_note(engine.config)}]\n")
            sys.stdout.write(run_text(engine, gen) + "\n")
            if args.trace:
                sys.stdout.write(f"trace written to {args.trace}\n")
    return 0

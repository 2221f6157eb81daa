"""moerun generate: stream text from the model under a memory cap; the run summary goes to stderr.

stdout holds the text alone (the prompt, then what the model wrote), so ``moerun generate > out.txt``
keeps just the text; the summary (speed, budget, hits, stalls, memory) goes to stderr, or nowhere with
``--quiet``.  With ``--json`` stdout holds one JSON document and nothing else.
"""

from __future__ import annotations

import sys

from moerun.cli import main as cli
from moerun.cli.report import Progress, emit_json, written
from moerun.cli.summary import cap_warning, model_note, run_json, run_text
from moerun.errors import BadOption
from moerun.files.fileio import check_output
from moerun.files.trace import write_trace
from moerun.model.sampling import Sampling
from moerun.runtime.options import load

HELP = "generate text under a memory cap (text on stdout; speed, hits, stalls and memory on stderr)"


def add_arguments(p) -> None:
    cli.add_model(p)
    cli.add_prompt(p)
    cli.add_memory(p)
    p.add_argument("--trace", metavar="FILE", help="write every routing decision and page-in event to FILE (.npz)")
    cli.add_routing(p, "read every layer's routing from this trace instead of the routers "
                       "(everything else is computed for real; to run large random models with a trained model's routing)")
    p.add_argument("--warm-from", metavar="FILE",
                   help="fill the expert pool with the hottest experts of this routing profile ('moerun profile') "
                        "before the first token; the fill's time is part of the prefill time")
    cli.add_force(p, "the --trace file")
    p.add_argument("--quiet", action="store_true", help="print the text only: no run summary or notices on stderr (warnings still)")
    cli.add_json(p)


def run(args) -> int:
    if args.max_new < 0:  # refuse before loading the model or echoing the prompt
        raise BadOption(f"--max-new must be zero or more, got {args.max_new}")
    cli.check_prompt_file(args)  # read once the model (its tokenizer and context) is known
    inputs = (cli.model_files(args.model) + ([args.prompt_file] if args.prompt_file else []) + ([args.routing] if args.routing else [])
              + ([args.warm_from] if args.warm_from else []))
    if args.trace:
        check_output(args.trace, args.force, inputs, "--trace")
    sampling = Sampling(args.temperature, args.top_p, args.seed)
    engine = load(**cli.engine_kwargs(args), routing=args.routing, warm_from=args.warm_from)
    stream = not args.json
    new: list[int] = []
    out = sys.stdout
    prompt_shown = False
    shown = ""  # the generated text written so far

    def show_prompt() -> None:
        nonlocal prompt_shown
        if stream and not prompt_shown:
            out.write(prompt)
            prompt_shown = True

    def on_token(tok: int) -> None:
        nonlocal shown
        new.append(tok)
        progress.update(len(new), "tokens")
        if not stream:
            return
        show_prompt()  # only once prefill succeeded: a prompt the model refuses is never echoed
        text = engine.tokenizer.decode(new)
        if text.endswith("\ufffd"):  # an incomplete UTF-8 sequence; wait for the next token
            return
        out.write(text[len(shown) :])
        out.flush()
        shown = text

    with engine:
        cli.check_against_model(args, engine.config)
        prompt, prompt_ids = cli.read_prompt(args, engine.tokenizer, engine.config.max_seq_len)
        if args.trace:
            engine.start_trace()
        partial = True
        # under --json nothing streams: progress lines say the run is alive (otherwise the text is its progress)
        progress = Progress("generate", args.max_new, enabled=None if args.json else False)
        try:
            gen = engine.generate(prompt_ids=prompt_ids, max_new=args.max_new, sampling=sampling, on_token=on_token)
            partial = False
        finally:
            progress.close()
            if args.trace and engine.recorder is not None:
                write_trace(args.trace, engine.finish_trace(partial=partial, extra={"text": "generate"}),
                            force=args.force, inputs=inputs, what="--trace")
        warning = cap_warning(engine)
        if args.json:
            doc = {"prompt": prompt, "text": gen.text, "note": model_note(engine.config), **run_json(engine, gen)}
            if args.trace:
                doc["trace"] = args.trace
            emit_json(doc)
        else:
            show_prompt()
            out.write(gen.text[len(shown) :] + "\n")
            out.flush()
            if not args.quiet:
                sys.stderr.write(f"\n[{model_note(engine.config)}]\n{run_text(engine, gen)}\n")
        if args.trace and not args.quiet:
            written("generate", "trace", args.trace)
        if warning:
            sys.stderr.write(f"moerun generate: warning: {warning}\n")
    return 0

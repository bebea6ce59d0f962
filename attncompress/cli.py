"""The command line: one click group, each command a thin call into `attncompress.api`."""
from __future__ import annotations

import json
import os
import sys

from . import threads as threadlib

# Threads and OpenMP waiting from the machine's load (or --threads / ATTNCOMPRESS_THREADS), decided before
# torch starts its thread pool: spinning halves a decode step on free cores and wrecks it on shared ones.
threadlib.configure(sys.argv)

import click  # noqa: E402

from . import api, compress as pipeline, tune as tunelib
from .errors import CompressError
from .factorize import DEFAULT_DAMPING
from .compare import DECODE_STEPS, DECODE_WEIGHTS
from .io.storage import DTYPES
from .model import STEP_ROWS
from .io.write import DEFAULT_SHARD_SIZE
from .strategies import DEFAULT_STRATEGY, STRATEGIES, WEIGHTS_ONLY_STRATEGY


def _run(fn, *args, **kwargs):
    """Call an API function; a user error becomes one line on stderr and exit status 1."""
    try:
        return fn(*args, **kwargs)
    except CompressError as e:
        raise click.ClickException(str(e)) from None
    except KeyboardInterrupt:
        click.echo("Error: interrupted; nothing was left half-written", err=True)
        sys.exit(130)


def _emit(report: dict, as_json: bool, text: str) -> None:
    click.echo(json.dumps(report, indent=2, default=str) if as_json else text)


# Options several commands share; the help says what each command makes of them.
def _out_opt(help: str, required: bool = False):
    return click.option("--out", required=required, type=click.Path(), help=help)


def _force_opt(help: str = "Replace --out if it exists."):
    return click.option("--force", is_flag=True, help=help)


def _json_opt(help: str = "Print the report as JSON."):
    return click.option("--json", "as_json", is_flag=True, help=help)


def _dtype_opt(default: str):
    return click.option("--dtype", type=click.Choice(list(DTYPES)),
                        help=f"Number format of the weights written (int8: per-output-channel weight-only; the "
                             f"runtime widens to float32 at load). [default: {default}]")


_compute_opt = click.option(
    "--compute", type=click.Choice(list(tunelib.COMPUTES)), default=tunelib.DEFAULT_COMPUTE, show_default=True,
    help="Precision of the tune's products: bfloat16 (autocast; weights, optimiser and losses stay float32), "
         "float32, or auto: bfloat16 where the CPU multiplies it natively (AVX512-BF16, AMX).")


def _texts_opt(help: str, required: bool = False, name: str = "--text", dest: str = "texts"):
    return click.option(name, dest, multiple=True, required=required, type=click.Path(), help=help)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="attncompress")
def main():
    """Make a pretrained transformer smaller on a CPU, and measure what it cost.

    PATH is a model directory (config.json + safetensors), a .safetensors or .gguf file, a directory written
    by this tool, or builtin:NAME for a built-in model (builtin:smollm2-135m, builtin:minilm-l6).
    """


@main.command()
@click.argument("path")
@_json_opt()
@click.option("--heads", type=int, help="Query heads, for a bare .safetensors file with no config.json.")
@click.option("--kv-heads", type=int, help="Key/value heads, for a bare .safetensors file (default: --heads).")
def inspect(path, as_json, heads, kv_heads):
    """Family, shape, parameter counts and the weight pairs found in each layer."""
    r = _run(api.inspect, path, heads, kv_heads)
    from .report import inspect_text
    _emit(r, as_json, inspect_text(r))


@main.command()
@click.argument("path")
@_texts_opt("UTF-8 text file (repeatable).", required=True)
@click.option("--context", default=512, show_default=True, help="Tokens per window.")
@click.option("--stride", type=int, help="Tokens scored per window after the first (at most --context - 1); smaller "
              "gives each prediction more earlier text. [default: --context]")
@click.option("--max-tokens", type=int, help="Score only the first N tokens of the stream.")
@_json_opt()
def perplexity(path, texts, context, stride, max_tokens, as_json):
    """Token-level perplexity of a decoder over the concatenated text files."""
    r = _run(api.perplexity, path, list(texts), context, stride, max_tokens)
    _emit(r, as_json, f"perplexity {r['perplexity']:.4f} over {r['tokens']} tokens "
                      f"(context {r['context']}, stride {r['stride']})")


def _decode_weights_opt(f):
    return click.option("--decode-weights", type=click.Choice(DECODE_WEIGHTS), default="auto", show_default=True,
                        help="Product weights while decoding: float16 halves the bytes each token reads (torch's "
                        f"16-bit one-row kernel, float32 activations); auto takes it when a step has at most "
                        f"{STEP_ROWS} rows. Perplexities are always float32.")(f)


def _decode_step_opt(f):
    return click.option("--decode-step", type=click.Choice(DECODE_STEPS), default="auto", show_default=True,
                        help="How one sequence's decode steps run: auto takes the compiled kernel (the whole step in "
                        "one call, built with the C compiler on first use) where it applies, float16 decoders with "
                        "RMS norms and a gated SiLU feed-forward; torch runs every operation through torch.")(f)


@main.command()
@click.argument("path")
@click.option("--prompt", "prompts", multiple=True, help="Text to continue (repeatable).")
@click.option("--prompt-file", type=click.Path(), help="UTF-8 file, one prompt per line.")
@click.option("--max-tokens", default=64, show_default=True, help="New tokens per prompt.")
@click.option("--temperature", default=0.0, show_default=True, help="0: greedy; else the sampling temperature.")
@click.option("--top-p", default=1.0, show_default=True, help="Sample from the smallest set of tokens with this mass.")
@click.option("--seed", default=0, show_default=True, help="Seed of the sampling (with --batch, fixes the tokens).")
@click.option("--batch", default=8, show_default=True, help="Prompts of one length decoded together.")
@_decode_weights_opt
@_decode_step_opt
@_out_opt("Write prompts, completions and token ids as JSON to this file.")
@_json_opt()
def generate(path, prompts, prompt_file, max_tokens, temperature, top_p, seed, batch, decode_weights, decode_step, out,
             as_json):
    """Continue prompts with a decoder, source or compressed (KV cache, batched); tokens/s on stderr."""
    from .texts import read_lines
    prompts = list(prompts) + (_run(read_lines, prompt_file) if prompt_file else [])
    if not prompts:
        raise click.UsageError("give --prompt TEXT or --prompt-file FILE")
    r = _run(api.generate, path, prompts, max_tokens=max_tokens, temperature=temperature, top_p=top_p, seed=seed,
             batch=batch, decode_weights=decode_weights, decode_step=decode_step)
    click.echo(f"{r['tokens']} tokens in {r['seconds']:.1f}s ({r['tokens_per_second'] or 0:.1f} tokens/s, "
               f"{r['settings']['decode_weights']} weights, steps: {r['settings']['decode_step']}, "
               f"{threadlib.current().describe()})", err=True)
    if out:
        from .io.write import write_json_atomic
        _run(write_json_atomic, out, r)
    _emit(r, as_json, "\n\n".join(p + c for p, c in zip(r["prompts"], r["completions"])))


@main.command()
@click.argument("path")
@click.option("--text", required=True, type=click.Path(), help="UTF-8 file, one sentence per line.")
@_json_opt("Print the embeddings as JSON.")
@_out_opt("Write the embeddings as JSON to this file.")
def embed(path, text, as_json, out):
    """Mean-pooled sentence embeddings of an encoder."""
    r = _run(api.embed, path, text)
    if out:
        from .io.write import write_json_atomic
        _run(write_json_atomic, out, r)
        click.echo(f"wrote {len(r['lines'])} embeddings of width {r['dim']} to {out}")
    else:
        _emit(r, as_json, f"{len(r['lines'])} embeddings of width {r['dim']} (use --json or --out to see them)")


_text_opt = _texts_opt("Calibration text file (repeatable); makes the spectra activation-aware (whitened).")
_damp_opt = click.option("--damping", default=DEFAULT_DAMPING, show_default=True,
                         help="Whitening damping, relative to the mean diagonal of each input Gram matrix.")


@main.command()
@click.argument("path")
@_text_opt
@_damp_opt
@_out_opt("Directory for spectra.json, summary.md and plots.", required=True)
@_force_opt()
def spectrum(path, texts, damping, out, force):
    """Singular values of every QK/VO product and feed-forward matrix, and energy kept per rank."""
    from .report import write_spectrum
    r = _run(api.spectrum, path, list(texts) or None, damping)
    note = _run(write_spectrum, r, out, force)
    click.echo(f"wrote {out}/spectra.json and {out}/summary.md; {note}")


_keep_opt = click.option("--keep", type=float, help="Fraction of transformer-block matrix parameters to keep, in (0, 1].")
_strategy_opt = click.option("--strategy", type=click.Choice(list(STRATEGIES)), default=None,
                             help=f"How ranks are shared out under the budget. [default: {DEFAULT_STRATEGY} with "
                                  f"--text (cuts priced by the calibration loss), {WEIGHTS_ONLY_STRATEGY} without]")
_cut_opts = [
    click.option("--sequential/--no-sequential", default=True, show_default=True,
                 help="Whiten each layer on the inputs the already-cut layers produce (needs --text)."),
    click.option("--refit/--no-refit", default=True, show_default=True,
                 help="After each layer's cut, solve its input factors by least squares to reproduce the dense "
                      "outputs on the calibration text (with --sequential)."),
]


def _cut_options(fn):
    for opt in reversed(_cut_opts):
        fn = opt(fn)
    return fn


@main.command()
@click.argument("path")
@_keep_opt
@_strategy_opt
@_text_opt
@_damp_opt
@_out_opt("Write the plan JSON here (edit it and pass it to compress --plan).")
@_json_opt("Print the summary as JSON.")
def plan(path, keep, strategy, texts, damping, out, as_json):
    """Choose ranks per layer under a --keep budget, without writing a model."""
    r = _run(api.plan, path, out, keep, strategy, list(texts) or None, damping)
    from .report import plan_text
    _emit(r["summary"], as_json, plan_text(r["summary"]) + (f"\nwrote {out}" if out else ""))


@main.command()
@click.argument("path")
@_keep_opt
@click.option("--plan", "plan_file", type=click.Path(), help="A plan JSON (from `attncompress plan --out`), instead of --keep.")
@_strategy_opt
@_text_opt
@click.option("--weights-only", is_flag=True, help="Plain SVD of the weights, no calibration text (risky: see the warning).")
@_damp_opt
@_out_opt("Directory to write.", required=True)
@_force_opt()
@click.option("--calib-blocks", type=int, default=None,
              help=f"Calibration passages to use at most [default: {pipeline.CALIB_BLOCKS} blocks of a decoder, "
                   f"{pipeline.CALIB_SENTENCES} sentences of an encoder].")
@click.option("--calib-context", default=pipeline.CALIB_CONTEXT, show_default=True,
              help="Tokens per calibration passage.")
@click.option("--shard-size", default=DEFAULT_SHARD_SIZE, show_default=True,
              help="Largest safetensors file to write; a bigger model is split into shards with an index.")
@_cut_options
@_dtype_opt("the source's float width; 16-bit for a quantised GGUF")
@_json_opt()
def compress(path, keep, plan_file, strategy, texts, weights_only, damping, out, force, calib_blocks, calib_context, shard_size,
             sequential, refit, dtype, as_json):
    """Cut ranks under a budget and write a smaller checkpoint."""
    if weights_only:
        click.echo("warning: --weights-only truncates by weights alone; on real small language models this can "
                   "raise perplexity by orders of magnitude. Calibration text (--text) is strongly advised.", err=True)
    if keep is not None and plan_file:
        raise click.UsageError("give --keep or --plan, not both")
    r = _run(api.compress, path, out, keep=keep, plan_file=plan_file, strategy=strategy, texts=list(texts) or None,
             weights_only=weights_only, damping=damping, force=force, n_blocks=calib_blocks, context=calib_context,
             shard_size=shard_size, sequential=sequential, refit=refit, dtype=dtype)
    from .report import plan_text
    _emit(r, as_json, plan_text(r["plan"]) + f"\nwrote {r['out']} ({r['method']['factors']}) in "
          + ", ".join(f"{k} {v:.1f}s" for k, v in r["seconds"].items()))


@main.command()
@click.argument("path")
@_out_opt("Dense model directory to write.", required=True)
@_force_opt()
@click.option("--dtype", type=click.Choice([d for d in DTYPES if d != "int8"]),
              help="Float format of the weights written. [default: the directory's; float16 for an int8 one]")
def expand(path, out, force, dtype):
    """Multiply a compressed directory's factors back into a dense model directory of the source layout."""
    r = _run(api.expand, path, out, force, dtype)
    click.echo(f"wrote {r['out']}: {r['tensors']} tensors, {r['parameters']:,} parameters")


@main.command()
@click.argument("path")
@_texts_opt("Training text file (repeatable).", required=True)
@_out_opt("Tuned directory to write.", required=True)
@click.option("--steps", default=100, show_default=True, help="Optimiser steps.")
@click.option("--batch", type=int, help="Blocks (encoders: sentences) per step, over all processes. "
              f"[default: 4 blocks, {tunelib.DEFAULT_SENTENCE_BATCH} sentences]")
@click.option("--context", default=128, show_default=True, help="Tokens per block (encoders: most tokens per sentence).")
@click.option("--lr", type=float, default=None, help="Peak learning rate (warm-up, then cosine). "
              f"[default: {tunelib.DEFAULT_LR:g}, encoders {tunelib.DEFAULT_SENTENCE_LR:g}]")
@click.option("--seed", default=0, show_default=True, help="Seed of the data order.")
@click.option("--decay", type=click.Choice(list(tunelib.DECAYS)), default=tunelib.DEFAULT_DECAY, show_default=True,
              help="frobenius: λ·Σ‖A Bᵀ‖² over the factor pairs (mind its scale: see the README); factor: AdamW "
                   "weight decay on the factors.")
@click.option("--decay-coef", default=tunelib.DEFAULT_DECAY_COEF, show_default=True, help="λ of --decay.")
@click.option("--penalty-every", default=tunelib.DEFAULT_PENALTY_EVERY, show_default=True,
              help="Evaluate the Frobenius penalty every N steps, weighted N·λ (lazy regularisation).")
@click.option("--teacher", help="Distil from this model, or 'none'. [default: the source model in the manifest]")
@click.option("--temperature", default=tunelib.DEFAULT_TEMPERATURE, show_default=True, help="Distillation temperature T.")
@click.option("--mix", default=tunelib.DEFAULT_MIX, show_default=True,
              help="Weight of the next-token loss; 1 − mix goes to T²·KL(teacher ‖ student).")
@click.option("--topk", default=tunelib.DEFAULT_TOPK, show_default=True, help="Teacher tokens cached per position for the KL.")
@_texts_opt("Held-out text file (repeatable): perplexity before and after.", name="--eval-text", dest="eval_texts")
@click.option("--eval-tokens", type=int, help="Score at most N tokens of each --eval-text.")
@click.option("--save-every", default=100, show_default=True, help="Checkpoint every N steps (0: never).")
@click.option("--resume", is_flag=True, help="Continue from the checkpoint of an interrupted run.")
@click.option("--train-norms", is_flag=True, help="Also train the norm weights.")
@click.option("--train-dense", is_flag=True, help="Also train the feed-forward matrices the plan left dense.")
@click.option("--embed-loss", type=click.Choice(list(tunelib.EMBED_LOSSES)), default=tunelib.DEFAULT_EMBED_LOSS,
              show_default=True, help="Encoders: 1 − cosine, or squared error, of the normalised pooled embeddings.")
@click.option("--hidden-weight", type=float, default=None,
              help="Encoders: weight of the last hidden states' relative squared error against the teacher's "
                   f"(0: off). [default: {tunelib.DEFAULT_HIDDEN_WEIGHT:g}]")
@click.option("--heldout", default=tunelib.DEFAULT_HELDOUT, show_default=True,
              help="Fraction of the text's blocks held out; the step of the lowest held-out loss is written (0: off).")
@click.option("--eval-every", default=tunelib.DEFAULT_EVAL_EVERY, show_default=True,
              help="Steps between held-out evaluations.")
@click.option("--patience", default=tunelib.DEFAULT_PATIENCE, show_default=True,
              help="Stop when the held-out loss rose at this many evaluations in a row.")
@_force_opt("Replace --out, and a stale checkpoint, if they exist.")
@_dtype_opt("the input directory's; the trained weights are float32 either way")
@_compute_opt
@click.option("--quiet", is_flag=True, help="No progress line.")
@_json_opt()
def tune(path, texts, out, steps, batch, context, lr, seed, decay, decay_coef, penalty_every, teacher, temperature,
         mix, topk, eval_texts, eval_tokens, save_every, resume, train_norms, train_dense, embed_loss, hidden_weight,
         heldout, eval_every, patience,
         force, dtype, compute, quiet, as_json):
    """Fine-tune a compressed directory's factors on text (distilling from the source model); also under torchrun."""
    def go():
        try:
            return api.tune(path, list(texts), out, steps=steps, batch=batch, context=context, lr=lr, seed=seed,
                                decay=decay, decay_coef=decay_coef, penalty_every=penalty_every,
                                temperature=temperature, mix=mix, teacher=teacher, topk=topk,
                                eval_texts=list(eval_texts), eval_tokens=eval_tokens, save_every=save_every,
                                resume=resume, train_norms=train_norms, train_dense=train_dense,
                                embed_loss=embed_loss, hidden_weight=hidden_weight, heldout=heldout,
                                eval_every=eval_every, patience=patience, force=force, dtype=dtype, compute=compute,
                                quiet=quiet)
        except tunelib.TuneInterrupted as e:
            click.echo(str(e), err=True)
            sys.exit(130)
    r = _run(go)
    if r["processes"] > 1 and int(os.environ.get("RANK", "0")) != 0:
        return
    c = r["curve"]
    lines = [f"tuned steps {r['start_step'] + 1}-{r['steps']} in {r['seconds']['train']:.1f}s "
             f"({r['tokens_per_second'] or 0:.0f} tok/s): loss {c[0]['loss']:.4f} -> {c[-1]['loss']:.4f}"
             if c and r["steps"] > r["start_step"] else "nothing left to train"]
    from .report import tune_lines
    lines += tune_lines(r)
    before, after = r["eval"]["before"] or {}, r["eval"]["after"] or {}
    for name in after:
        b, a = before[name], after[name]
        if "perplexity" in a:
            lines.append(f"held-out {name}: perplexity {b['perplexity']:.3f} -> {a['perplexity']:.3f}")
        else:
            lines.append(f"held-out {name} ({a['sentences']} sentences) against the teacher: mean cosine "
                         f"{b['cosine']['mean']:.4f} -> {a['cosine']['mean']:.4f}, top-1 neighbour unchanged "
                         f"{100 * b['neighbour_agreement']:.1f}% -> {100 * a['neighbour_agreement']:.1f}%")
    lines.append(f"wrote {r['out']}")
    _emit(r, as_json, "\n".join(lines))


@main.command()
@click.argument("a")
@click.argument("b")
@_texts_opt("Text file (repeatable): perplexity of decoders; for encoders one sentence per line.")
@click.option("--context", default=512, show_default=True, help="Tokens per perplexity window.")
@click.option("--stride", type=int, help="Tokens scored per perplexity window after the first (at most --context - 1). "
              "[default: --context]")
@click.option("--max-tokens", type=int, help="Score only the first N tokens of the text.")
@click.option("--runs", default=5, show_default=True, help="Timed runs per speed figure (median); 0 skips speed.")
@click.option("--threads", help="auto, N, or N:active / N:passive: threads and OpenMP waiting [default: auto, from the "
              "cores busy at start-up; also ATTNCOMPRESS_THREADS]; on a machine shared with other heavy "
              "jobs use 1 or N:passive.")
@_decode_weights_opt
@_decode_step_opt
@_json_opt("Print the report as JSON (schema attncompress.compare/1).")
@_out_opt("Write compare.json, report.md and PNG plots to this directory.")
@_force_opt()
@click.option("--quiet", is_flag=True, help="No progress lines.")
def compare(a, b, texts, context, stride, max_tokens, runs, threads, decode_weights, decode_step, as_json, out, force,
            quiet):
    """Model A against model B: size, KV cache, perplexity or embedding agreement, and speed side by side."""
    from .report import compare_text, write_compare
    if threads is not None:
        _run(threadlib.parse_spec, threads)
    r = _run(api.compare, a, b, list(texts) or None, out=out, force=force, context=context, stride=stride,
             max_tokens=max_tokens, speed_runs=runs, decode_weights=decode_weights, decode_step=decode_step,
             quiet=quiet)
    note = _run(write_compare, r, out, force) if out else None
    _emit(r, as_json, compare_text(r) + (f"\nwrote {out}/report.md and {out}/compare.json; {note}" if out else ""))


@main.command()
@click.argument("path")
@click.option("--keep", type=float, required=True, help="Fraction of transformer-block matrix parameters to keep, in (0, 1].")
@_texts_opt("Calibration and tuning text (repeatable; a file or corpus:NAME).", required=True)
@_texts_opt("Held-out text for the comparison (repeatable); default: the calibration text.", name="--eval-text",
            dest="eval_texts")
@_strategy_opt
@_cut_options
@click.option("--blend", type=click.Choice(list(api.BLENDS)), default=None,
              help="General text added to --text for calibration and tuning: samples (text the source model writes, "
                   "corpus:samples), pydoc (corpus:pydoc-calibration), both, or none (text). [default: "
                   f"{api.DEFAULT_BLEND} for a decoder, {api.ENCODER_BLEND} for an encoder]")
@click.option("--steps", type=int, default=None,
              help="Most tuning steps (the held-out loss picks the step). [default: "
                   f"{api.RUN_STEPS['decoder']} for a decoder, {api.RUN_STEPS['encoder']} for an encoder]")
@click.option("--mix", default=api.RUN_MIX, show_default=True,
              help="Weight of the next-token loss in the tune; 1 − mix goes to distillation from the source.")
@click.option("--decay", type=click.Choice(list(tunelib.DECAYS)), default=tunelib.DEFAULT_DECAY, show_default=True,
              help="Penalty while tuning.")
@click.option("--eval-tokens", default=4096, show_default=True, help="Tokens scored per comparison (0: all).")
@_compute_opt
@_decode_weights_opt
@_decode_step_opt
@_out_opt("Directory for compressed/, tuned/ and report/.", required=True)
@_force_opt()
@_json_opt("Print the comparison as JSON.")
def run(path, keep, texts, eval_texts, strategy, sequential, refit, blend, steps, mix, decay, eval_tokens,
        compute, decode_weights, decode_step, out, force, as_json):
    """The whole job: compress with calibration, tune the factors, compare before and after."""
    from .report import compare_text, tune_lines
    r = _run(api.run, path, out, keep=keep, texts=list(texts), eval_texts=list(eval_texts) or None, strategy=strategy,
             sequential=sequential, refit=refit, blend=blend, steps=steps, mix=mix, decay=decay,
             max_eval_tokens=eval_tokens or None, compute=compute, decode_weights=decode_weights,
             decode_step=decode_step, force=force)
    before = []
    if r["compare_compressed"]:
        q = r["compare_compressed"]["quality"]
        before = [f"before the tune (compressed/ against A): mean cosine {q['cosine']['mean']:.4f}, p5 "
                  f"{q['cosine']['p5']:.4f}, min {q['cosine']['min']:.4f}, top-1 neighbour unchanged "
                  f"{100 * q['neighbour_agreement']:.1f}%, Spearman {q['spearman']:.4f}"]
    times = ", ".join(f"{k} {v:.0f}s" for k, v in r["seconds"].items())
    _emit(r["compare"], as_json, "\n".join(tune_lines(r["tune"]) + r["tune"]["warnings"] + [
        compare_text(r["compare"])] + before + [f"time: {times}", f"wrote {out}/compressed, {out}/tuned and {out}/report"]))


if __name__ == "__main__":
    main()

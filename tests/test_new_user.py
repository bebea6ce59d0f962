"""The job as a new user meets it: the README's first command, output folders that do not exist yet, hand-edited plans."""
import json
import re
import shlex
from pathlib import Path

from click.testing import CliRunner

from attncompress import plan as planlib
from attncompress.cli import main
from attncompress.loading import load_weights

ROOT = Path(__file__).resolve().parents[1]


def readme_first_command() -> list[str]:
    """The arguments of the README's first `attncompress` command (the main job), as a user would type them."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```\n(.*?)```", text, flags=re.S)
    first = next(b for b in blocks if ".venv/bin/attncompress " in b).strip()
    setup, _, command = first.partition("&&")
    assert setup.strip() == "bash scripts/setup.sh", first
    args = shlex.split(command)
    assert args[0] == ".venv/bin/attncompress", first
    return args[1:]


def test_readme_first_command_runs_in_a_fresh_folder(tiny_dirs, tmp_path, monkeypatch):
    args = readme_first_command()
    assert args[0] == "run" and args[1].startswith("builtin:")
    out = Path(args[args.index("--out") + 1])
    assert not out.is_absolute() and len(out.parts) >= 2  # the demo writes below a folder a fresh clone lacks
    # the same command on a tiny model with its own calibration text from examples/, two tuning steps
    args[1] = str(tiny_dirs["llama"][0])
    args = [str(ROOT / a) if a.startswith("examples/") else a for a in args]
    monkeypatch.chdir(tmp_path)
    r = CliRunner().invoke(main, args + ["--steps", "2", "--eval-tokens", "512"])
    assert r.exit_code == 0, r.output
    for sub in ("compressed", "tuned", "report"):
        assert (tmp_path / out / sub).is_dir(), sub
    assert (tmp_path / out / "report" / "compare.json").is_file()
    assert not list((tmp_path / out.parent).glob(".*partial*"))


def test_a_failed_write_leaves_no_new_folders(tiny_dirs, tmp_path):
    out = tmp_path / "new" / "deeper" / "c"
    r = CliRunner().invoke(main, ["compress", str(tiny_dirs["llama"][0]), "--keep", "0.001", "--weights-only",
                                  "--out", str(out)])
    assert r.exit_code == 1, r.output
    assert not (tmp_path / "new").exists()


def _written_plan(tiny_dirs, tmp_path) -> tuple[Path, dict]:
    d = tiny_dirs["llama"][0]
    path = tmp_path / "plans" / "p.json"  # `plan --out` makes the missing folder
    r = CliRunner().invoke(main, ["plan", str(d), "--keep", "0.6", "--out", str(path)])
    assert r.exit_code == 0, r.output
    return d, json.loads(path.read_text())


def test_a_plan_edited_down_to_its_ranks_is_accepted(tiny_dirs, tmp_path):
    d, data = _written_plan(tiny_dirs, tmp_path)
    del data["predicted"]
    for lr in data["layers"]:
        del lr["qk_pairs"]
    data["layers"][0]["qk"] = 3
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(data))
    out = tmp_path / "c"
    r = CliRunner().invoke(main, ["compress", str(d), "--plan", str(edited), "--weights-only", "--out", str(out)])
    assert r.exit_code == 0, r.output
    shape, w, *_ = load_weights(out)
    # layer 0 keeps 3 rotary pairs: 2·3 query rows per head (the rows the runtime stores)
    assert w["layers.0.attn.q.weight"].shape[0] == shape.n_heads * 6
    manifest = json.loads((out / "attncompress.json").read_text())
    # the counts were made from the ranks: the same as counting the edited plan from scratch
    fresh = planlib.count_params(shape, planlib.RankPlan.from_json(json.dumps(manifest["plan"])))
    assert manifest["plan"]["predicted"]["block_params_kept"] == fresh.block_kept


def test_a_stale_prediction_is_replaced_with_a_note(tiny_dirs, tmp_path):
    d, data = _written_plan(tiny_dirs, tmp_path)
    data["layers"][1]["vo"] = 2  # ranks edited, predicted left as it was, pairs still listed
    data["layers"][1]["qk"] = 3
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(data))
    r = CliRunner().invoke(main, ["compress", str(d), "--plan", str(edited), "--weights-only", "--out",
                                  str(tmp_path / "c")])
    assert r.exit_code == 0, r.output
    assert f"note: plan {edited}: qk_pairs of layer(s) 1 did not match qk and will be chosen again" in r.output
    assert f"note: plan {edited}: 'predicted' was stale (block_params_kept, kv_bytes_per_token)" in r.output


def test_an_edited_plan_with_a_bad_rank_names_layer_and_field(tiny_dirs, tmp_path):
    d, data = _written_plan(tiny_dirs, tmp_path)
    data["layers"][1]["ff"]["up"] = "many"
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(data))
    r = CliRunner().invoke(main, ["compress", str(d), "--plan", str(edited), "--weights-only", "--out",
                                  str(tmp_path / "c")])
    assert r.exit_code == 1
    assert r.output.strip().splitlines()[-1] == (
        f"Error: plan {edited}: layer 1 up: expected a whole number (rank), got 'many'")

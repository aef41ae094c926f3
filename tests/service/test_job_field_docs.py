"""README's job field table and ``grovekeeper tune --help`` list every field of
vocabulary/job_fields.py with the same default, and the options build the same request."""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from client.job_options import add_job_options, job_request, option_dest
from service.jobrequest import JobCreate
from vocabulary.job_fields import JOB_FIELDS

ROOT = Path(__file__).resolve().parents[2]


def _readme_rows() -> dict[str, list[str]]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("\n## Job fields\n", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
        if line.startswith("| `") and len(cells) == 6:
            rows[cells[0].strip("`")] = cells
    return rows


def _help() -> str:
    out = subprocess.run([sys.executable, "-m", "service", "tune", "--help"],
                         capture_output=True, text=True, cwd=ROOT, check=True,
                         env={"COLUMNS": "200", "PATH": "", "PYTHONPATH": str(ROOT)})
    return " ".join(out.stdout.split())  # argparse wraps lines: compare words only


def test_readme_lists_every_job_field() -> None:
    rows = _readme_rows()
    assert list(rows) == list(JOB_FIELDS)  # every field, once, in the vocabulary's order


@pytest.mark.parametrize("name", list(JOB_FIELDS))
def test_readme_default_example_and_option_agree(name: str) -> None:
    spec, cells = JOB_FIELDS[name], _readme_rows()[name]
    _, kind, default, example, option, description = cells
    assert kind == spec.type
    assert default == spec.shown_default
    assert json.loads(example.strip("`")) == spec.example
    assert description.startswith(spec.description)
    if spec.options:
        assert f"`{spec.options[0]}`" in option
    else:
        assert option == "(the argument)"


def test_tune_help_names_every_field_with_its_default() -> None:
    text = _help()
    for spec in JOB_FIELDS.values():
        if not spec.options:
            assert "dataset_id" in text
            continue
        shown = spec.shown_default if spec.required else f"default: {spec.shown_default}"
        # "--seed SEED seeds the hold-out, ... (default: 0)"
        pattern = (re.escape(spec.options[0]) + r"[ ,]" + r".*?"
                   + re.escape(f"{spec.description} ({shown})"))
        assert re.search(pattern, text), (spec.name, shown)


def _parse(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    parser.add_argument("dataset_id")
    add_job_options(parser)
    return parser.parse_args(["ds_1", *argv])


def test_every_option_sets_its_field() -> None:
    """Each field's example, given through its option, lands in the request where the
    server's model reads it."""
    argv = []
    for spec in JOB_FIELDS.values():
        if not spec.options:
            continue
        example, option = spec.example, spec.options[0]
        if spec.type == "boolean":
            argv.append(option if example else f"--no-{option[2:]}")
        elif spec.name == "search_space":
            argv += [option, json.dumps(example)]
        elif spec.type == "groups":
            for group in example:
                argv += [option, ",".join(group)]
        elif spec.type == "map":
            for key, value in example.items():
                argv += [option, f"{key}={value}"]
        elif spec.type == "columns":
            for column in example:
                argv += [option, column]
        else:
            argv += [option, str(example)]
    body = job_request(_parse(*argv))
    request = JobCreate.model_validate(body)
    for spec in JOB_FIELDS.values():
        group, _, leaf = spec.name.rpartition(".")
        value = getattr(getattr(request, group) if group else request, leaf)
        expected = spec.example if spec.name != "dataset_id" else "ds_1"
        assert value == expected, spec.name


def test_options_left_out_send_nothing() -> None:
    args = _parse("--target", "y")
    assert job_request(args) == {"dataset_id": "ds_1", "target": "y"}
    assert all(getattr(args, option_dest(s)) is None for s in JOB_FIELDS.values()
               if s.options and s.name != "target")


def test_bounds_are_checked_before_sending(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        _parse("--target", "y", "--holdout-fraction", "0.9")
    assert "at most 0.5" in capsys.readouterr().err

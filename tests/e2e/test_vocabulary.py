"""One vocabulary: retired names appear nowhere a user reads them.

``boosting_rounds`` is the count's name in JSON and "rounds" on screen; "trees" only where
it counts trees per class (a multiclass model grows one per class in each round).
``number`` is the trial number in JSON, "trial" on screen. Scanned: every command's
``--help``, the OpenAPI document (property, parameter and example keys, descriptions)
and a real report page of a multiclass job.
"""

from __future__ import annotations

import argparse
import re
from collections.abc import Iterator
from html import unescape
from typing import Any

import pandas as pd
import pytest
from sklearn.datasets import load_iris

from service.cli import build_parser
from tests.conftest import Server, wait_for_job

pytestmark = pytest.mark.e2e
#: JSON keys that once named the count of boosting rounds or the trial number.
RETIRED_KEYS = frozenset({"trees", "num_trees", "n_trees", "rounds", "trial"})
#: "trees" as a count ("120 trees", "number of trees"): the count is rounds.
TREE_COUNT = re.compile(r"\b(\d[\d,]*|number of|count of)\s+trees\b(?!: one per class)",
                        re.IGNORECASE)


def _parsers(parser: argparse.ArgumentParser, name: str = "grovekeeper"
             ) -> Iterator[tuple[str, argparse.ArgumentParser]]:
    yield name, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub, child in action.choices.items():
                yield from _parsers(child, f"{name} {sub}")


def test_command_help_says_rounds_and_trial() -> None:
    found = []
    for name, parser in _parsers(build_parser()):
        text = parser.format_help()
        # "trees" is never the word for the count on the command line, and no option
        # takes a retired name.
        found += [f"{name}: {m.group(0)!r}" for m in re.finditer(r"\btrees\b", text)]
        for action in parser._actions:
            for option in action.option_strings:
                if option.lstrip("-").replace("-", "_") in RETIRED_KEYS:
                    found.append(f"{name}: option {option}")
    assert not found, found
    board = dict(_parsers(build_parser()))["grovekeeper board"].format_help()
    assert "trial" in board  # the screen word for the number is used


def _keys(node: Any, path: str = "") -> Iterator[tuple[str, str]]:
    """Every dict key in ``node`` with where it sits."""
    if isinstance(node, dict):
        for key, value in node.items():
            yield key, path
            yield from _keys(value, f"{path}/{key}")
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from _keys(value, f"{path}/{i}")


def _strings(node: Any) -> Iterator[str]:
    if isinstance(node, str):
        yield node
    elif isinstance(node, dict):
        for value in node.values():
            yield from _strings(value)
    elif isinstance(node, list):
        for value in node:
            yield from _strings(value)


def test_openapi_names_no_retired_key(server: Server) -> None:
    with server.client() as client:
        doc = client.get("/openapi.json").json()
    bad = []
    for key, where in _keys(doc):
        # A key of a schema's properties, of an example body, or a parameter's name.
        if key in RETIRED_KEYS and ("/properties" in where or "example" in where):
            bad.append(f"{where}/{key}")
    for path, operations in doc["paths"].items():
        for method, op in operations.items():
            bad += [f"{method} {path} ?{p['name']}" for p in op.get("parameters", [])
                    if p["name"] in RETIRED_KEYS]
    bad += [f"text {m.group(0)!r}" for s in _strings(doc) for m in TREE_COUNT.finditer(s)]
    assert not bad, bad
    # The names that replaced them are there.
    schemas = doc["components"]["schemas"]
    assert "boosting_rounds" in schemas["TrialOut"]["properties"]
    assert "number" in schemas["TrialOut"]["properties"]


@pytest.fixture(scope="module")
def multiclass(server: Server) -> dict:
    # Reference data: scikit-learn's bundled iris table (three classes).
    iris = load_iris(as_frame=True)
    frame = iris.data.assign(species=pd.Series(iris.target_names[iris.target]))
    with server.client() as client:
        up = client.post("/v1/datasets", params={"name": "iris"},
                         content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": up["id"], "target": "species",
                                            "budget": {"trials": 2}, "seed": 3}).json()
        job = wait_for_job(client, job["id"])
        assert job["status"] == "succeeded", server.log()
        model = client.get(f"/v1/models/{job['model_id']}").json()
        html = client.get(f"/v1/jobs/{job['id']}/report").text
        svgs = {name: client.get(f"/v1/jobs/{job['id']}/plots/{name}.svg").text
                for name in re.findall(r'src="plots/(\w+)\.svg"', html)}
    return {"job": job, "model": model, "html": html, "svgs": svgs}


def test_report_page_says_rounds_and_counts_trees_per_class(multiclass: dict) -> None:
    html, model = multiclass["html"], multiclass["model"]
    assert model["task"] == "multiclass" and len(model["classes"]) == 3
    headers = [unescape(h).strip().lower() for h in re.findall(r"<th[^>]*>(.*?)</th>", html)]
    assert "rounds" in headers and "trial" in headers
    assert not [h for h in headers if h in RETIRED_KEYS - {"rounds", "trial"}], headers
    text = unescape(re.sub(r"<[^>]+>", " ", html))
    assert not [m.group(0) for m in TREE_COUNT.finditer(text)]
    rounds = model["boosting_rounds"]
    # The one place trees are counted: per class, rounds x classes.
    plural = "s" if rounds != 1 else ""
    assert f"{rounds} boosting round{plural} ({rounds * 3} trees: one per class" in " ".join(
        text.split()), text


def test_plots_say_rounds(multiclass: dict) -> None:
    svgs = multiclass["svgs"]
    assert {"history", "learning"} <= set(svgs)
    for name, svg in svgs.items():
        texts = " ".join(unescape(t) for t in re.findall(r"<text[^>]*>(.*?)</text>", svg, re.S))
        labels = texts + " " + " ".join(re.findall(r"<!-- (.*?) -->", svg))
        assert not re.search(r"\btrees\b", labels), (name, labels[:500])
    assert "boosting round" in svgs["learning"]

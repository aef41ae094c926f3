"""One list of job fields (vocabulary/job_fields.py): the request model, the tuner's
defaults and the metric names all agree with it."""

from __future__ import annotations

import dataclasses
from typing import Any

import pytest
from pydantic import BaseModel

import vocabulary
from service.jobrequest import Budget, CVSpec, DecisionSpec, JobCreate, JobRequest, PromoteSpec
from tuner.config import SearchConfig
from tuner.metrics import METRICS
from vocabulary.job_fields import DEFAULT_TRIALS, GROUPS, JOB_FIELDS, TOP_LEVEL

NESTED: dict[str, type[BaseModel]] = {"budget": Budget, "cv": CVSpec,
                                      "decision": DecisionSpec, "promote": PromoteSpec}


def _model_fields() -> dict[str, Any]:
    """``{dotted name: pydantic FieldInfo}`` of the request model and its groups."""
    out = {}
    for name, info in JobCreate.model_fields.items():
        if name in NESTED:
            out.update({f"{name}.{n}": i for n, i in NESTED[name].model_fields.items()})
        else:
            out[name] = info
    return out


def test_every_request_field_is_declared_once() -> None:
    assert set(_model_fields()) == set(JOB_FIELDS)
    assert set(JobCreate.model_fields) == set(TOP_LEVEL)
    assert set(GROUPS) == set(NESTED)


@pytest.mark.parametrize("name", list(JOB_FIELDS))
def test_defaults_and_descriptions_come_from_the_vocabulary(name: str) -> None:
    declared, info = JOB_FIELDS[name], _model_fields()[name]
    assert info.description == declared.description
    if declared.required:
        assert info.is_required()
    else:
        assert info.get_default() == declared.default


@pytest.mark.parametrize("name", [n for n, f in JOB_FIELDS.items()
                                  if f.minimum is not None or f.maximum is not None])
def test_bounds_come_from_the_vocabulary(name: str) -> None:
    declared = JOB_FIELDS[name]
    group, _, leaf = name.rpartition(".")
    schema = (NESTED[group] if group else JobCreate).model_json_schema()
    prop = schema["properties"][leaf]
    options = prop.get("anyOf", [prop])
    numeric = next(o for o in options if o.get("type") in ("integer", "number"))
    if declared.minimum is not None:
        key = "exclusiveMinimum" if declared.above_minimum else "minimum"
        assert numeric[key] == declared.minimum
    if declared.maximum is not None:
        assert numeric["maximum"] == declared.maximum


@pytest.mark.parametrize("name", [n for n, f in JOB_FIELDS.items()
                                  if f.choices and f.type == "string"
                                  and n not in ("metric", "objective")])
def test_choices_come_from_the_vocabulary(name: str) -> None:
    group, _, leaf = name.rpartition(".")
    schema = (NESTED[group] if group else JobCreate).model_json_schema()
    prop = schema["properties"][leaf]
    options = prop.get("anyOf", [prop])
    assert any(tuple(o.get("enum", ())) == JOB_FIELDS[name].choices for o in options), prop


def test_examples_are_valid_requests() -> None:
    """Every field's example, put in a request, passes the request model."""
    body: dict[str, Any] = {}
    for name, declared in JOB_FIELDS.items():
        group, _, leaf = name.rpartition(".")
        (body.setdefault(group, {}) if group else body)[leaf] = declared.example
    JobCreate.model_validate(body)


def test_the_tuner_defaults_are_the_request_defaults() -> None:
    defaults = {f.name: f.default for f in dataclasses.fields(SearchConfig)
                if f.default is not dataclasses.MISSING}
    assert defaults["n_trials"] == DEFAULT_TRIALS == Budget().trials
    for setting in ("seed", "max_rounds", "early_stopping_rounds", "pruner", "selection",
                    "final_refit", "calibrate", "portfolio"):
        assert defaults[setting] == JOB_FIELDS[setting].default, setting


def test_metric_names_and_directions_agree_with_the_tuner() -> None:
    assert set(METRICS) == set(vocabulary.METRICS)
    for name, metric in METRICS.items():
        direction, tasks = vocabulary.METRICS[name]
        assert metric.direction == direction and set(metric.tasks) == set(tasks), name
    assert set(vocabulary.DEFAULT_METRICS) == set(vocabulary.TASKS)


def test_a_stored_request_is_validated_again() -> None:
    """The worker reads ``spec.request`` back into the same model: defaults filled from
    the vocabulary, and a value the API would refuse is refused again."""
    stored = JobCreate(dataset_id="ds_1", target="y").model_dump(mode="json")
    request = JobRequest.load(stored)
    assert request.max_rounds == JOB_FIELDS["max_rounds"].default
    assert request.budget.trials == DEFAULT_TRIALS
    assert JobRequest.load({"dataset_id": "ds_1", "target": "y"}) == request
    with pytest.raises(ValueError, match="max_rounds"):
        JobRequest.load({**stored, "max_rounds": 0})
    with pytest.raises(ValueError, match="colour"):
        JobRequest.load({**stored, "colour": "blue"})

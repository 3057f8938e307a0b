"""The compiled validator (fastjsonschema) decides; the interpreted one (jsonschema, the reference implementation
of JSON Schema) only words the error. They must agree on every document: the shipped and test descriptions,
the catalog, plans and check exports proposed from them, and invalid variants of each made by changing one
value at a time (wrong types, values out of range or outside an enum, missing and unknown keys)."""

from __future__ import annotations

import copy
import json
import random
from typing import Any, Iterator

import fastjsonschema
import pytest
import yaml

from conftest import all_pipelines
from stagewatch.catalog import load_catalog
from stagewatch.exporters.checks import checks_document
from stagewatch.plan import compose, dump
from stagewatch.resources import compiled, data_dir, validator
from stagewatch.spec import load_pipeline

WRONG = [None, True, -1, 0, 0.5, 1.0, 2e12, "", "x", "30d", "800d", "auto", "Name with space", [], ["x"], {},
         {"x": 1}]


def _valid() -> Iterator[tuple[str, str, Any]]:
    for path in all_pipelines():
        yield "pipeline", path.name, yaml.safe_load(path.read_text(encoding="utf-8"))
        plan = yaml.safe_load(dump(compose(load_pipeline(str(path)), load_catalog())))
        yield "plan", f"plan of {path.name}", plan
        yield "checks", f"checks of {path.name}", json.loads(json.dumps(checks_document(plan)))
    for path in sorted(data_dir("catalog").glob("*.yaml")):
        yield "catalog", path.name, yaml.safe_load(path.read_text(encoding="utf-8"))


def _places(data: Any, at: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    yield at
    if isinstance(data, dict):
        for key, value in data.items():
            yield from _places(value, (*at, key))
    elif isinstance(data, list):
        for i, value in enumerate(data):
            yield from _places(value, (*at, i))


def _variants(data: Any, rng: random.Random, count: int) -> Iterator[tuple[str, Any]]:
    """Documents that differ from ``data`` in one place: a value replaced, a key removed or added."""
    places = [p for p in _places(data) if p]
    for at in rng.sample(places, min(count, len(places))):
        parent = data
        for key in at[:-1]:
            parent = parent[key]
        for how in ("replace", "remove", "add"):
            changed = copy.deepcopy(data)
            target = changed
            for key in at[:-1]:
                target = target[key]
            if how == "replace":
                target[at[-1]] = rng.choice(WRONG)
            elif how == "remove":
                del target[at[-1]]
            elif isinstance(target, dict):
                target["unexpected_key"] = rng.choice(WRONG)
            else:
                continue
            yield f"{how} at {'.'.join(map(str, at))}", changed


def _verdicts(kind: str, data: Any) -> tuple[bool, bool]:
    try:
        compiled(kind)(data)
        fast = True
    except fastjsonschema.JsonSchemaValueException:
        fast = False
    return fast, validator(kind).is_valid(data)


CASES = list(_valid())


@pytest.mark.parametrize("kind,name,data", CASES, ids=[f"{k}:{n}" for k, n, _ in CASES])
def test_compiled_and_wording_validators_agree(kind, name, data):
    assert _verdicts(kind, data) == (True, True), f"{name} should be valid for both"
    rng = random.Random(f"{kind}:{name}")  # fixed seed per document
    disagreements, invalid = [], 0
    for change, variant in _variants(data, rng, count=40):
        fast, reference = _verdicts(kind, variant)
        invalid += not reference
        if fast != reference:
            disagreements.append(f"{change}: compiled {fast}, jsonschema {reference}")
    assert not disagreements, disagreements
    assert invalid >= 20  # the variants do reach the schema's rules


def test_a_rejected_document_is_worded_with_its_line(write):
    from stagewatch.errors import StagewatchError

    path = write("p.yaml", """
        pipeline: p
        context: business
        stages:
          - id: a
            kind: source
            modality: tabular
            output: records
            serving: batch
            volume_per_hour: -5
        """)
    with pytest.raises(StagewatchError) as info:
        load_pipeline(str(path))
    assert info.value.line == 9 and "volume_per_hour" in str(info.value)

"""Declaration validation: every bad declaration gets a one-line error naming the fix."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import pytest

from lossguard import SpecError, declare


def ce(z, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1))


def test_valid_declaration_keeps_what_was_said():
    spec = declare(ce, kind="categorical", reference="categorical_ce", ignore_label=-100, classes=4)
    assert (spec.kind, spec.inputs, spec.reduction, spec.classes, spec.ignore_label) == (
        "categorical", "logits", "mean", 4, -100)
    assert spec.describe()["reference"] == "categorical_ce"


def test_per_class_parameter_fixes_the_class_count():
    def weighted(z, y, weight):
        return ce(z, y)

    spec = declare(weighted, kind="categorical", params={"weight": [1.0, 2.0, 0.5]})
    assert spec.classes == 3


BAD = [
    (dict(loss=3, kind="categorical"), "loss=3: expected a callable"),
    (dict(loss=ce, kind="categorial"), "try 'categorical'"),
    (dict(loss=ce, kind="categorical", inputs="logit"), "try 'logits'"),
    (dict(loss=ce, kind="categorical", reduction="avg"), "reduction='avg'"),
    (dict(loss=ce, kind="binary", ignore_label=-1), "ignore_label=-1"),
    (dict(loss=ce, kind="categorical", ignore_label=1.5), "expected an integer"),
    (dict(loss=ce, kind="categorical", classes=1), "classes=1"),
    (dict(loss=ce, kind="categorical", classes=5, ignore_label=2), "a label outside [0, 5)"),
    (dict(loss=ce, kind="categorical", reference="categorical_cee"), "try 'categorical_ce'"),
    (dict(loss=ce, kind="binary", reference="categorical_ce"), "defined for kind='binary'"),
    (dict(loss=lambda z: z, kind="categorical"), "check its signature"),
    (dict(loss=ce, kind="categorical", params={"gamma": 2.0}), "accepting params ['gamma']"),
    (dict(loss=ce, kind="categorical", grad=5), "grad=5"),
]


@pytest.mark.parametrize("kwargs, fragment", BAD, ids=[b[1][:30] for b in BAD])
def test_bad_declarations_get_one_line_errors(kwargs, fragment):
    loss = kwargs.pop("loss")
    with pytest.raises(SpecError) as info:
        declare(loss, **kwargs)
    message = str(info.value)
    assert fragment in message
    assert "\n" not in message
    assert "expected" in message

"""Estimator labels and their rules (lensrec.labels)."""

from __future__ import annotations

import pytest

from lensrec import labels
from lensrec.labels import (
    COMBINED_ESTIMATORS,
    COMPONENTS,
    ESTIMATOR_FIELDS,
    ESTIMATORS,
    PAIR_ESTIMATORS,
    SUITE_STAGES,
    estimator_fields,
    estimator_pairs,
    is_symmetric,
    parse_component,
    parse_components,
    parse_estimator,
    parse_estimators,
    uses_b_modes,
)


def test_tables_agree():
    # a pair estimator's label spells its two fields (Okamoto & Hu 2003, PRD 67, 083002, Table I)
    for label, fields in ESTIMATOR_FIELDS.items():
        assert "".join(fields) == label and set(fields) <= set(labels.FIELDS)
    assert PAIR_ESTIMATORS == ("TT", "TE", "EE", "TB", "EB")
    # MV combines all five quadratic estimators (Okamoto & Hu 2003, §III)
    assert COMBINED_ESTIMATORS["MV"] == PAIR_ESTIMATORS
    assert ESTIMATORS[: len(PAIR_ESTIMATORS)] == PAIR_ESTIMATORS and "MV" in ESTIMATORS
    assert len(set(ESTIMATORS)) == len(ESTIMATORS)
    for table in (COMBINED_ESTIMATORS, labels.JOINT_ESTIMATORS):
        for label, pairs in table.items():
            assert label in ESTIMATORS and pairs and set(pairs) <= set(PAIR_ESTIMATORS)
    assert COMPONENTS == ("gradient", "curl")
    assert SUITE_STAGES == ("data", "simulations", "pairs")
    with pytest.raises(TypeError):
        ESTIMATOR_FIELDS["XX"] = ("T", "T")  # read-only: tables change in the source only


def test_rules():
    assert estimator_pairs("EB") == ("EB",)
    assert estimator_pairs("MV") == PAIR_ESTIMATORS
    assert estimator_fields("TE") == ("T", "E") and estimator_fields("MV") == ("T", "E", "B")
    # B modes enter TB, EB and any combination holding them; TT, TE, EE read no B
    assert [label for label in ESTIMATORS if uses_b_modes(label)] == ["TB", "EB", "MV", "GMV"]
    # the joint estimator filters T, E, B together (Maniyar et al. 2021, PRD 103, 083524)
    assert estimator_fields("GMV") == ("T", "E", "B")
    # the B-free minimum-variance combination: TT, TE and EE only (no B-mode reuse when delensing)
    assert estimator_pairs("TT+TE+EE") == ("TT", "TE", "EE") and not uses_b_modes("TT+TE+EE")
    assert estimator_fields("TT+TE+EE") == ("T", "E")
    assert [label for label in PAIR_ESTIMATORS if is_symmetric(label)] == ["TT", "EE"]
    with pytest.raises(ValueError, match="unknown estimator 'MV'"):
        is_symmetric("MV")  # only pair estimators have legs


def test_parse_estimators():
    assert parse_estimators("TT, EB") == ("TT", "EB")
    assert parse_estimators(["MV"]) == ("MV",)
    assert parse_estimators(ESTIMATORS) == ESTIMATORS
    assert parse_estimator("TB") == "TB"
    with pytest.raises(ValueError, match="unknown estimator 'tb'; did you mean 'TB'"):
        parse_estimators(("TT", "tb"))
    with pytest.raises(ValueError, match="unknown estimator 'EBB'; did you mean 'EB'"):
        parse_estimator("EBB")
    with pytest.raises(ValueError, match="unknown estimator 'MV'"):
        parse_estimator("MV", allowed=PAIR_ESTIMATORS)
    with pytest.raises(ValueError, match="unknown estimator 'QQ'.*Allowed: TT, TE"):
        parse_estimator("QQ")
    with pytest.raises(ValueError, match="at least one"):
        parse_estimators("")
    with pytest.raises(ValueError, match="estimators must be distinct.*'TT' is listed twice"):
        parse_estimators("TT,EB,TT")
    with pytest.raises(TypeError, match="estimator must be a string"):
        parse_estimators(["TT", 3])
    with pytest.raises(TypeError, match="estimators must be a sequence"):
        parse_estimators(5)


def test_parse_components():
    assert parse_components("curl") == ("curl",)
    assert parse_components(COMPONENTS) == COMPONENTS
    assert parse_component("gradient") == "gradient"
    with pytest.raises(ValueError, match="unknown component 'grad'; did you mean 'gradient'"):
        parse_component("grad")
    with pytest.raises(ValueError, match="unknown component 'Curl'; did you mean 'curl'"):
        parse_components(["gradient", "Curl"])
    with pytest.raises(ValueError, match="distinct"):
        parse_components(["curl", "curl"])
    with pytest.raises(ValueError, match="at least one"):
        parse_components([])
    with pytest.raises(TypeError, match="component must be one of"):
        parse_component(None)


def test_labels_are_part_of_the_public_api():
    import lensrec

    for name in ("ESTIMATORS", "COMPONENTS", "parse_estimators", "uses_b_modes"):
        assert name in lensrec.__all__ and getattr(lensrec, name) is getattr(labels, name)

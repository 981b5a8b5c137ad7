"""Annotations: plain-data labels, arrows and regions; JSON round trip and validation."""
from __future__ import annotations

import json
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import workbench.annotations as ann
from workbench.errors import AnnotationError


def _all_kinds():
    return [
        ann.Label("L", -10.0, 50.0, colour="vermilion", size=14, weight="normal", box=False),
        ann.Arrow(-30.0, 40.0, -5.0, 52.5, text="jet streak", colour="#0072b2", width=2.5),
        ann.Region([(-20, 40), (0, 40), (0, 55), (-20, 55)], label="upper PV anomaly",
                   fill="sky", alpha=0.3, linestyle="dotted"),
        ann.SectionLabel("fold", 1200.0, 350.0, space="section:0"),
        ann.SectionArrow(500.0, 700.0, 900.0, 400.0, text="ascent", space="section:main-line"),
        ann.SectionRegion([(100, 900), (800, 900), (800, 500)], label="moist", space="section:1"),
    ]


def test_every_kind_round_trips_through_json():
    items = _all_kinds()
    text = json.dumps(ann.annotations_to_list(items))
    back = ann.annotations_from_list(json.loads(text))
    assert back == items
    assert [type(a) for a in back] == [type(a) for a in items]
    # hex colour strings are what the views receive
    assert back[0].colour == ann.PALETTE["vermilion"]
    assert back[2].fill == ann.PALETTE["sky"]


def test_spaces_and_filtering():
    items = _all_kinds()
    assert [a.kind for a in ann.in_space(items, "map")] == ["label", "arrow", "region"]
    assert [a.kind for a in ann.in_space(items, "section:0")] == ["section_label"]
    assert items[4].section_key == "main-line"
    assert items[0].section_key is None
    assert ann.section_space(3) == "section:3"


def test_region_centroid_of_a_rectangle_and_triangle():
    # planar polygon centroid (shoelace formula): rectangle -> its centre, triangle -> vertex mean
    r = ann.Region([(-20, 40), (0, 40), (0, 56), (-20, 56)])
    assert r.centroid() == pytest.approx((-10.0, 48.0))
    t = ann.SectionRegion([(0, 900), (600, 900), (300, 300)])
    assert t.centroid() == pytest.approx((300.0, 700.0))


def test_closing_vertex_is_dropped():
    r = ann.Region([(0, 40), (10, 40), (10, 50), (0, 40)])
    assert len(r.polygon) == 3


@pytest.mark.parametrize(
    "make, words",
    [
        (lambda: ann.Label("x", 0.0, 95.0), "lat"),
        (lambda: ann.Label("", 0.0, 45.0), "text"),
        (lambda: ann.Label("x", float("nan"), 45.0), "finite"),
        (lambda: ann.Label("x", 0.0, 45.0, colour="chartreuse-ish"), "colour"),
        (lambda: ann.Label("x", 0.0, 45.0, space="section:0"), "space"),
        (lambda: ann.Label("x" * 600, 0.0, 45.0), "characters"),
        (lambda: ann.Label("x", True, 45.0), "number"),
        (lambda: ann.Arrow(0, 45, 0, 45), "same point"),
        (lambda: ann.Region([(0, 40), (1, 41)]), "3 distinct"),
        (lambda: ann.Region([(0, 40), (1, 41), "a"]), "vertex 2"),
        (lambda: ann.Region([(0, 40), (1, 41), (2, 40)], linestyle="wavy"), "linestyle"),
        (lambda: ann.Region([(0, 40), (1, 41), (2, 40)], alpha=2.0), "alpha"),
        (lambda: ann.SectionLabel("x", 100.0, 1500.0), "pressure_hpa"),
        (lambda: ann.SectionLabel("x", -5.0, 500.0), "distance_km"),
        (lambda: ann.SectionLabel("x", 10.0, 500.0, space="map"), "section:"),
        (lambda: ann.SectionArrow(0, 500, 10, 500, space="section:a b"), "section:"),
        (lambda: ann.Label("x", 0.0, 45.0, id="bad id!"), "id"),
    ],
)
def test_invalid_annotations_are_refused_with_the_field_named(make, words):
    with pytest.raises(AnnotationError) as err:
        make()
    assert words in str(err.value)


def test_from_dict_refuses_unknown_type_fields_and_missing_fields():
    with pytest.raises(AnnotationError, match="unknown"):
        ann.annotation_from_dict({"type": "circle", "lon": 0, "lat": 0})
    with pytest.raises(AnnotationError, match="unknown field"):
        ann.annotation_from_dict({"type": "label", "text": "x", "lon": 0, "lat": 45,
                                  "onclick": "alert(1)"})
    with pytest.raises(AnnotationError, match="required"):
        ann.annotation_from_dict({"type": "label", "text": "x"})
    with pytest.raises(AnnotationError, match="JSON object"):
        ann.annotation_from_dict(["label"])
    with pytest.raises(AnnotationError, match="list"):
        ann.annotations_from_list({"type": "label"})


def test_duplicate_ids_are_refused():
    a = ann.Label("a", 0, 45, id="same")
    b = ann.Label("b", 1, 46, id="same")
    with pytest.raises(AnnotationError, match="twice"):
        ann.annotations_from_list([a.to_dict(), b.to_dict()])


def test_strings_are_kept_as_data_not_evaluated():
    text = "__import__('os').system('echo hacked')"
    a = ann.annotation_from_dict({"type": "label", "text": text, "lon": 0, "lat": 45})
    assert a.text == text  # stored verbatim, nothing run


finite_lon = st.floats(-180, 360, allow_nan=False)
finite_lat = st.floats(-89.9, 89.9, allow_nan=False)


@settings(max_examples=60, deadline=None)
@given(text=st.text(min_size=1, max_size=40).filter(lambda s: s.strip()), lon=finite_lon,
       lat=finite_lat, lon2=finite_lon, lat2=finite_lat,
       colour=st.sampled_from(sorted(ann.PALETTE)))
def test_random_annotations_round_trip(text, lon, lat, lon2, lat2, colour):
    items = [ann.Label(text, lon, lat, colour=colour)]
    if (lon, lat) != (lon2, lat2):
        items.append(ann.Arrow(lon, lat, lon2, lat2, text=text))
    back = ann.annotations_from_list(json.loads(json.dumps(ann.annotations_to_list(items))))
    assert back == items
    assert all(math.isfinite(x) for a in back for p in a.points() for x in p)

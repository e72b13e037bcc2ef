"""A farm's boundary file holding several fields, read the ways a per-field run needs.

The demo field and two copies of it moved east make a three-field file in WGS 84.  Each
field is written to a file of its own (:func:`split_boundary`), read back as one field,
projected to its UTM zone and area-checked; choosing a feature in the farm file gives the
same outline as its own file; reading the farm file whole merges with a warning.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import geopandas as gpd
import pytest
import shapely

from pmap.errors import PmapWarning
from pmap.io.boundary import (
    check_field_area,
    field_lonlat_points,
    geodesic_area_m2,
    load_boundary,
    project_boundary,
    read_boundary,
    select_boundary,
    split_boundary,
)
from pmap.io.crs import choose_working_crs

DEMO_BOUNDARY = Path(__file__).resolve().parents[2] / "demo_grids" / "boundary.geojson"


@pytest.fixture
def farm(tmp_path):
    demo = gpd.read_file(DEMO_BOUNDARY)
    outline = demo.geometry.iloc[0]
    width = outline.bounds[2] - outline.bounds[0]  # degrees of longitude
    parts = [outline, shapely.affinity.translate(outline, xoff=2 * width),
             shapely.affinity.translate(outline, xoff=4 * width)]
    path = tmp_path / "farm.geojson"
    gpd.GeoDataFrame({"NAME": ["Long Meadow", "Far Piece", "Long Meadow East"],
                      "farm": ["Harrow Creek Farm"] * 3},
                     geometry=parts, crs=demo.crs).to_file(path)
    return path


def test_each_field_of_a_farm_file_is_a_field_of_its_own(farm, tmp_path):
    written = split_boundary(farm, tmp_path / "fields")
    assert [f.name for f, _ in written] == ["Long Meadow", "Far Piece", "Long Meadow East"]
    areas = []
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # one feature per file: no merge warning
        for feat, file in written:
            outline, file_crs = read_boundary(file)
            assert file_crs == "EPSG:4326"
            working, _ = choose_working_crs(None, *field_lonlat_points(outline, file_crs), 0.005)
            # Source: the UTM zone definition (6-degree zones from 180 W; -89 lies in 16),
            # northern hemisphere codes EPSG:326zz.
            assert working == "EPSG:32616"
            projected = project_boundary(outline, file_crs, working, file.name)
            check_field_area(projected, working, geodesic_area_m2(outline, file_crs), file.name)
            areas.append(projected.area)
            # The feature chosen in the farm file is the same outline as its own file.
            chosen, _ = read_boundary(farm, feature=f"name={feat.name}")
            assert chosen.equals(outline)
    demo_area = load_boundary(DEMO_BOUNDARY, "EPSG:32616").area
    assert areas[0] == pytest.approx(demo_area, rel=1e-9)
    # Moved 2 and 4 field widths east, the copies keep their area within the UTM scale
    # variation over that distance (well under 0.1 %).
    assert areas[1:] == pytest.approx([demo_area] * 2, rel=1e-3)


def test_reading_the_farm_file_whole_merges_with_a_warning(farm):
    with pytest.warns(PmapWarning, match="farm.geojson: 3 features merged into one field: "
                      "Long Meadow, Far Piece, Long Meadow East; they do not touch"):
        selection = select_boundary(farm)
    # Source: shapely (the union of disjoint polygons keeps every polygon and the area sum).
    assert selection.merged and selection.n_parts == 3
    one = [read_boundary(farm, feature=f"#{n}")[0].area for n in (1, 2, 3)]
    assert selection.geometry.area == pytest.approx(sum(one), rel=1e-12)

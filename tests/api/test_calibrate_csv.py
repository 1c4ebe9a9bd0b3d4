"""Calibrate from CSV text: the route reads it with the one reader the page and the
command line share (``curvekeeper.csvpoints``)."""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient

from tests.api.helpers import CODES_422, Keys, expect_error, ok

URL = "/v1/channels/site-a.p1/calibrate"
TEXT = "# bath 2, reference PRT\ncurrent_mA,pressure_kPa\n0,1\n50,101\n100,201\n"


def test_bad_csv_is_refused_naming_the_line_and_nothing_changes(client: TestClient, keys: Keys,
                                                                 make_channel: Any) -> None:
    make_channel()
    tech = keys["technician"]
    expect_error(client, "POST", URL, 403, "forbidden", headers=keys["device"], json={"csv": TEXT})
    for body, message in (
            ({"csv": TEXT, "points": [{"x": 1, "y": 2}]}, "not both"),
            ({"points": [{"x": 1, "y": 2}], "x_columns": ["a"]}, "give csv too"),
            ({"csv": "x,y\n1,2\n3,warm\n"}, "line 3: y is not a number: 'warm'"),
            ({"csv": "# only a comment\n"}, "no rows"),
            ({"csv": "a,b\n"}, "no data rows"),
            ({"csv": TEXT, "x_columns": ["voltage"]}, "x column 'voltage' is not in the header (its columns: "
                                                      "current_mA, pressure_kPa)"),
            ({"csv": TEXT, "y_column": 3}, "y column 3 does not exist"),
            ({"csv": TEXT, "x_columns": ["a", "b"]}, "2 x column(s) given, but the channel has 1"),
            ({"csv": TEXT, "x_columns": [1], "y_column": "1"}, "used twice"),
            ({"csv": "x,y\n1,2\n3\n"}, "line 3: 1 field(s)"),
            ({"csv": "x,y\n1,inf\n"}, "not a finite number")):
        err = expect_error(client, "POST", URL, 422, CODES_422, headers=tech, json=body)
        assert message in err["message"], (body, err)
    expect_error(client, "POST", URL, 422, CODES_422, headers=tech, json={"csv": ""})
    expect_error(client, "POST", URL, 422, CODES_422, headers=tech, json={"csv": TEXT, "x_columns": []})


def test_csv_points_are_fitted_and_logged_as_points(client: TestClient, keys: Keys, make_channel: Any) -> None:
    make_channel()
    tech = keys["technician"]
    preview = ok(client.post(URL, json={"csv": TEXT, "dry_run": True}, headers=tech))
    assert preview["csv"] == {"x_columns": ["current_mA"], "y_column": "pressure_kPa", "rows": 3}
    assert preview["applied"] is False and preview["n"] == 3
    assert [round(c, 9) for c in preview["poly_coefficients"]] == [1.0, 2.0]  # y = 1 + 2 x, exact points
    # columns chosen, in another order and by position, with ';' between fields
    swapped = "pressure_kPa;current_mA\n1;0\n101;50\n201;100\n"
    by_pos = ok(client.post(URL, json={"csv": swapped, "x_columns": [2], "y_column": "PRESSURE_KPA",
                                       "dry_run": True}, headers=tech))
    assert by_pos["poly_coefficients"] == preview["poly_coefficients"]
    assert by_pos["csv"] == {"x_columns": ["current_mA"], "y_column": "pressure_kPa", "rows": 3}
    done = ok(client.post(URL, json={"csv": TEXT, "label": "bath 2"}, headers=tech))
    assert done["applied"] is True
    event = ok(client.get("/v1/channels/site-a.p1/events?kind=calibration", headers=tech))["items"][-1]
    assert event["details"]["points"] == [[[0.0], 1.0], [[50.0], 101.0], [[100.0], 201.0]]  # replay reads these
    plain = ok(client.post(URL, json={"points": [{"x": 0, "y": 1}, {"x": 100, "y": 201}], "dry_run": True},
                           headers=tech))
    assert plain["csv"] is None

"""``lodemap bench map``'s comparison with exact Gaussian-process
regression: the row the speed aim is judged on.

Reference: scikit-learn's ``GaussianProcessRegressor`` (the exact GP the
benchmark compares with). The aim is "at least 30 times faster at equal or
better held-out RMSE": the judged row is the fastest that is at least as
accurate as the exact GP at validation points, and it is reported at the
test points, which play no part in the choice.
"""

import json

import pytest

from mapping.benchmarks.map import judge, verdict
from mapping.cli import main


def test_comparison_grid_and_convergence_towards_exact(tmp_path):
    out = tmp_path / "bench.json"
    assert main(["bench", "map", "--samples", "0", "--exact-samples", "400", "--exact-n-basis", "64,256",
                 "--exact-margin", "1.5,3", "--repeat", "1", "--json", str(out)]) == 0
    res = json.loads(out.read_text())["exact"]["like_for_like"]
    grid, exact = res["per-component"], res["sklearn"]
    assert [(r["margin_m"], r["n_basis"]) for r in grid] == [(1.5, 64), (1.5, 256), (3.0, 64), (3.0, 256)]
    assert res["judged"] == judge(grid, exact)
    # more basis functions bring the reduced-rank map towards the exact one
    # (Solin & Särkkä 2020: the approximation converges as the basis grows)
    for margin in (1.5, 3.0):
        small, large = (r for r in grid if r["margin_m"] == margin)
        for key in ("rmse_ut", "val_rmse_ut"):
            assert abs(large[key] - exact[key]) < abs(small[key] - exact[key])


def test_judged_row_is_chosen_on_validation_points_and_reported_on_test_points():
    # hand-made rows: B is the fastest of those at least as accurate as exact
    # on the validation points (A is faster but worse there; C is as good but
    # slower); on the test points B is worse than exact, so the aim is not met
    exact = {"rmse_ut": 1.500, "val_rmse_ut": 1.600}
    a = {"margin_m": 3.0, "n_basis": 1024, "ratio": 60.0, "rmse_ut": 1.490, "val_rmse_ut": 1.601}
    b = {"margin_m": 3.0, "n_basis": 1296, "ratio": 40.0, "rmse_ut": 1.501, "val_rmse_ut": 1.600}
    c = {"margin_m": 3.0, "n_basis": 1600, "ratio": 25.0, "rmse_ut": 1.499, "val_rmse_ut": 1.599}
    assert judge([a, b, c], exact) is b
    assert verdict("x", b, exact, [a, b, c]).endswith("(worse): aim (30x at equal or better RMSE) not met")
    assert verdict("x", c, exact, [a, b, c]).endswith("(equal or better): aim (30x at equal or better RMSE) not met")
    fast_c = dict(c, ratio=31.0)
    assert verdict("x", fast_c, exact, [fast_c]).endswith("aim (30x at equal or better RMSE) met")
    assert judge([a], exact) is None
    assert "no row is as accurate as exact" in verdict("x", None, exact, [a])


@pytest.mark.parametrize("value", ["64,x", "64,,256", "64,64", "nan", "0"])
def test_basis_lists_are_checked(capsys, value):
    # argparse's usage error: exit status 2 and one line naming the option
    with pytest.raises(SystemExit) as exc:
        main(["bench", "map", "--exact-n-basis", value])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "--exact-n-basis" in err and repr(value) in err

"""The planning pipeline (optimiser.plan): case in, policies and totals out.

Computed policies are checked against independent computations with scipy of the published formulas:
the Hadley-Whitin optimality conditions and cost (G. Hadley & T. M. Whitin, Analysis of Inventory Systems,
1963), the exact fill rate for normal lead-time demand, β = 1 − σ[G(z_R) − G(z_{R+Q})]/Q (W. J. Hopp &
M. L. Spearman, Factory Physics, from memory), and lead-time demand moments d·L, L·σ_d² + d²·σ_L² (Hadley &
Whitin 1963). Case data are invented (tests/conftest.py).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from casefiles import BASE_FILES
from scipy import stats

import optimiser.plan as plan_module
from optimiser.case import load_case
from optimiser.plan import NETWORK_DELAY_WARNING, POLICY_COLUMNS, evaluate_case, plan_case

SHOP_SITES = "site,upstream\nshop,\n"
SHOP_DEMAND = "site,item,daily_mean,daily_sd\nshop,a,12,4\nshop,b,3,2\nshop,c,0.2,0.5\n"
NORMAL_ITEMS = (
    "item,supplier,unit_cost,holding_cost,backorder_cost\na,sup1,10,,6\nb,sup1,4,1.5,3\nc,sup2,50,,30\n"
)


def normal_loss(z: np.ndarray) -> np.ndarray:
    """First-order standard normal loss G(z) = φ(z) − z·(1 − Φ(z)), with scipy."""
    return stats.norm.pdf(z) - z * stats.norm.sf(z)


def _single_site(case_writer, files: dict | None = None):
    base = {"sites.csv": SHOP_SITES, "demand.csv": SHOP_DEMAND, "items.csv": NORMAL_ITEMS}
    base.update(files or {})
    return load_case(case_writer(base))


def test_worked_example_through_the_whole_pipeline(case_writer) -> None:
    """h = 2, A = 50, b = 25, D = 200, μ = 100, σ = 25 (Nahmias, Production and Operations Analysis, ch. 5,
    from memory: Q ≈ 111, R ≈ 143). Converged values recomputed here by the Hadley-Whitin fixed point."""
    files = {
        "case.toml": 'name = "worked"\ndays_per_year = 200\ndistribution = "normal"\n',
        "sites.csv": SHOP_SITES,
        "suppliers.csv": "supplier,lead_days,order_cost\nsup,100,50\n",
        "items.csv": "item,supplier,unit_cost,holding_cost,backorder_cost\nx,sup,10,2,25\n",
        # 1 unit a day for 200 days; sd 2.5 a day over 100 days gives σ = 25
        "demand.csv": "site,item,daily_mean,daily_sd\nshop,x,1,2.5\n",
    }
    result = plan_case(load_case(case_writer(files)))
    row = result.policies.iloc[0]
    h, a, b, d, mu, sigma = 2.0, 50.0, 25.0, 200.0, 100.0, 25.0
    q = math.sqrt(2 * a * d / h)
    for _ in range(200):  # independent fixed point: 1 − Φ(z) = hQ/(bD), Q = sqrt(2D(A + b·n(R))/h)
        z = stats.norm.isf(h * q / (b * d))
        q = math.sqrt(2 * d * (a + b * sigma * normal_loss(z)) / h)
    r = mu + sigma * z
    cost = h * (q / 2 + r - mu) + a * d / q + b * d * sigma * normal_loss((r - mu) / sigma) / q
    assert row["order_quantity"] == pytest.approx(q, rel=1e-6)
    assert row["reorder_point"] == pytest.approx(r, rel=1e-6)
    assert row["total_cost"] == pytest.approx(cost, rel=1e-6)
    assert (q, r, cost) == pytest.approx((110.774, 142.568, 306.68), abs=1e-2)  # methods sheet, computed
    assert row["lead_time_demand_mean"] == pytest.approx(mu) and row["lead_time_demand_sd"] == pytest.approx(
        sigma
    )


def test_cost_mode_meets_hadley_whitin_conditions(case_writer) -> None:
    case = _single_site(case_writer)
    result = plan_case(case)
    pol = result.policies.set_index("item")
    table = result.itemsites.set_index("item")
    for item in ("a", "b"):  # normal items (case.toml distribution = "normal")
        p, t = pol.loc[item], table.loc[item]
        mu = t["daily_mean"] * t["lead_days"]
        sigma = math.sqrt(t["lead_days"] * t["daily_sd"] ** 2 + t["daily_mean"] ** 2 * t["lead_days_sd"] ** 2)
        assert p["lead_time_demand_mean"] == pytest.approx(mu)
        assert p["lead_time_demand_sd"] == pytest.approx(sigma)
        d, a, h, b = t["annual_demand"], t["order_cost"], t["holding_cost"], t["backorder_cost"]
        z = (p["reorder_point"] - mu) / sigma
        assert stats.norm.sf(z) == pytest.approx(h * p["order_quantity"] / (b * d), rel=1e-6)
        q = math.sqrt(2 * d * (a + b * sigma * normal_loss(z)) / h)
        assert p["order_quantity"] == pytest.approx(q, rel=1e-6)
        assert p["ordering_cost"] == pytest.approx(a * d / p["order_quantity"], rel=1e-9)


def test_fill_rate_target_is_met_exactly(case_writer) -> None:
    toml = BASE_FILES["case.toml"].replace('mode = "cost"', 'mode = "fill_rate"\n        target = 0.97')
    case = _single_site(case_writer, {"case.toml": toml})
    result = plan_case(case)
    for p in result.policies.itertuples(index=False):
        if p.distribution != 0:
            continue
        z_r = (p.reorder_point - p.lead_time_demand_mean) / p.lead_time_demand_sd
        z_rq = z_r + p.order_quantity / p.lead_time_demand_sd
        beta = 1 - p.lead_time_demand_sd * (normal_loss(z_r) - normal_loss(z_rq)) / p.order_quantity
        assert beta == pytest.approx(0.97, abs=1e-6)
        assert p.fill_rate == pytest.approx(beta, abs=1e-9)


def test_totals_add_up(case_writer) -> None:
    result = plan_case(load_case(case_writer()))
    pol = result.policies
    assert list(pol.columns) == POLICY_COLUMNS
    sums = pol.groupby("site")[["ordering_cost", "holding_cost", "backorder_cost", "total_cost"]].sum()
    totals = result.site_totals.set_index("site")
    for column in sums.columns:
        assert np.allclose(totals.loc[sums.index, column], sums[column], rtol=1e-12)
        assert result.network[column] == pytest.approx(pol[column].sum(), rel=1e-12)
    parts = pol[["ordering_cost", "cycle_stock_cost", "safety_stock_cost", "backorder_cost"]].sum(axis=1)
    assert np.allclose(parts, pol["total_cost"], rtol=1e-9, atol=1e-9)
    assert np.allclose(pol["holding_cost"], pol["cycle_stock_cost"] + pol["safety_stock_cost"])


def test_network_without_network_method_plans_each_site_alone(case_writer, monkeypatch) -> None:
    monkeypatch.setattr(plan_module, "_network_function", lambda name: None)
    result = plan_case(load_case(case_writer()))
    assert NETWORK_DELAY_WARNING in result.warnings
    assert result.method == "single-site"
    pol = result.policies.set_index(["site", "item"])
    wa = pol.loc[("wh", "a")]
    # warehouse faces s1 (12, sd 4) + s2 (8, sd 3) over the supplier lead time 10 ± 2 days
    assert wa["lead_time_demand_mean"] == pytest.approx(20 * 10)
    assert wa["lead_time_demand_sd"] == pytest.approx(math.sqrt(10 * (16 + 9) + 20**2 * 2**2))
    s1a = pol.loc[("s1", "a")]
    assert s1a["lead_time_days"] == 2.0 and s1a["expected_delay_days"] == 0.0
    assert s1a["lead_time_demand_mean"] == pytest.approx(24.0)


def test_network_method_is_used_when_available(case_writer, monkeypatch) -> None:
    calls = []

    def fake_plan_network(itemsites: pd.DataFrame, settings) -> pd.DataFrame:
        calls.append(len(itemsites))
        return plan_module._plan_single_site(itemsites, settings, [])

    monkeypatch.setattr(
        plan_module, "_network_function", lambda name: fake_plan_network if name == "plan_network" else None
    )
    result = plan_case(load_case(case_writer()))
    assert calls == [7] and result.method == "network"
    assert NETWORK_DELAY_WARNING not in result.warnings


def test_zero_demand_holds_no_stock(case_writer) -> None:
    demand = SHOP_DEMAND + "shop,zero,0,0\n"
    items = NORMAL_ITEMS + "zero,sup1,5,,2\n"
    result = plan_case(_single_site(case_writer, {"demand.csv": demand, "items.csv": items}))
    row = result.policies.set_index("item").loc["zero"]
    assert (row["order_quantity"], row["reorder_point"], row["total_cost"], row["orders_per_year"]) == (
        0,
        0,
        0,
        0,
    )
    assert row["note"] != 0


def test_evaluate_matches_exact_formulas(case_writer) -> None:
    case = _single_site(case_writer)
    given = pd.DataFrame(
        {
            "site": ["shop"] * 3,
            "item": ["a", "b", "c"],
            "reorder_point": [130.0, 35.0, 5.0],
            "order_quantity": [400.0, 90.0, 6.0],
        }
    )
    result = evaluate_case(case, given)
    assert result.command == "evaluate"
    pol = result.policies.set_index("item")
    p = pol.loc["a"]
    mu, sigma, q, r = p["lead_time_demand_mean"], p["lead_time_demand_sd"], 400.0, 130.0
    z_r, z_rq = (r - mu) / sigma, (r + q - mu) / sigma
    assert p["fill_rate"] == pytest.approx(1 - sigma * (normal_loss(z_r) - normal_loss(z_rq)) / q, rel=1e-9)
    assert p["cycle_service"] == pytest.approx(stats.norm.cdf(z_r), rel=1e-9)
    assert (p["reorder_point"], p["order_quantity"]) == (r, q)
    d = 12 * 360
    assert p["ordering_cost"] == pytest.approx(55.0 * d / q)


def test_plan_reports_todays_policies(case_writer) -> None:
    policies = "site,item,reorder_point,order_quantity\nshop,a,130,400\nshop,b,35,90\n"
    case = _single_site(case_writer, {"policies.csv": policies})
    result = plan_case(case)
    assert any("1 stocked item-site(s) have no current policy" in w for w in result.warnings)
    current = result.current.set_index("item")
    assert set(current.index) == {"a", "b"}
    direct = evaluate_case(case, case.policies).policies.set_index("item")
    assert current.loc["a", "total_cost"] == pytest.approx(direct.loc["a", "total_cost"], rel=1e-12)
    comparison = result.comparison.set_index("site")
    recommended = result.policies.set_index("item").loc[["a", "b"], "total_cost"].sum()
    assert comparison.loc["(network)", "recommended_total_cost"] == pytest.approx(recommended)
    assert comparison.loc["(network)", "current_total_cost"] == pytest.approx(current["total_cost"].sum())
    # the recommended policies are cost-optimal: today's cannot be cheaper
    assert comparison.loc["(network)", "saving"] >= -1e-9


def test_history_case_plans(case_writer) -> None:
    history = (
        "date,site,item,quantity\n"
        + "".join(f"2025-01-{day:02d},shop,a,{(day * 7) % 5 + 1}\n" for day in range(1, 31))
        + "2025-01-09,shop,b,2\n"
    )
    case = _single_site(case_writer, {"demand.csv": None, "history.csv": history})
    result = plan_case(case)
    assert set(result.policies["item"]) == {"a", "b"}
    assert (result.policies["total_cost"] > 0).all()


def test_extreme_values_give_finite_policies(case_writer) -> None:
    """Huge and tiny demand and costs, zero variability, on purpose: every figure finite, with notes."""
    files = {
        "case.toml": 'name = "extremes"\ndistribution = "auto"\n',
        "sites.csv": SHOP_SITES,
        "suppliers.csv": "supplier,lead_days,order_cost\nsup,5,1e6\n",
        "items.csv": "item,supplier,unit_cost,backorder_cost\nx,sup,1e-3,1e9\ny,sup,1e6,1\nz,sup,1,1\n",
        "demand.csv": "site,item,daily_mean,daily_sd\nshop,x,1e7,0\nshop,y,1e-6,1e-6\nshop,z,5,0\n",
    }
    result = plan_case(load_case(case_writer(files)))
    numbers = result.policies.drop(columns=["site", "item"]).to_numpy(dtype=float)
    assert np.isfinite(numbers).all()
    pol = result.policies.set_index("item")
    # no demand variability: deterministic lot size, the EOQ sqrt(2AD/h) (Harris 1913, common practice)
    d, a, h = 1e7 * 365, 1e6, 0.25 * 1e-3
    assert pol.loc["x", "order_quantity"] == pytest.approx(math.sqrt(2 * a * d / h), rel=1e-6)
    assert (pol["note"] != 0).all()

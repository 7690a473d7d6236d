"""Figures shared by the page and the HTML report: the fitted-semivariogram overlay (the
empirical semivariogram of the models' residuals with each fitted model's implied curve) and
the next-study power curve.

Plotly only, no web framework: the CLI report draws it without loading the app.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go

#: one line colour per model (cycled), distinct from the empirical points
CURVE_COLOURS = ("#1b6a9e", "#c0621a", "#2c8a5a", "#8c4a9c", "#a33b4b", "#127f86")
EMPIRICAL_COLOUR = "#2b2b2b"
CURVE_POINTS = 160


def model_curves(models, max_lag: float, n: int = CURVE_POINTS) -> pd.DataFrame:
    """Each fitted model's implied semivariogram on a lag grid: columns model, lag, gamma."""
    lags = np.linspace(0.0, float(max_lag), n)
    parts = [pd.DataFrame({"model": name, "lag": lags, "gamma": fit.variogram_curve(lags)})
             for name, fit in models.fits.items()]
    return (pd.concat(parts, ignore_index=True) if parts
            else pd.DataFrame({"model": [], "lag": [], "gamma": []}))


#: Caption of the semivariogram overlay (page and report).
OVERLAY_CAPTION = ("Points: empirical semivariogram (sized by pair count) of the residuals from "
                   "the models' own mean — the fixed-effects design fitted by ordinary least "
                   "squares — not of the smooth trend used for exploration, so points and lines "
                   "describe the same residuals. Lines: the semivariogram implied by each fitted "
                   "model (★ = preferred).")


def variogram_overlay(bins: pd.DataFrame, curves: pd.DataFrame, *, unit: str, response: str,
                      response_unit: str = "", preferred: str | None = None) -> go.Figure:
    """Empirical semivariogram (points sized by pairs) with each model's fitted curve.

    Parameters
    ----------
    bins : DataFrame
        ``Semivariogram.to_frame()``: lag_mean, gamma, pairs (and bin edges).
    curves : DataFrame
        :func:`model_curves`: model, lag, gamma.
    unit : str
        Time unit (x axis).
    response, response_unit : str
        Response name and unit (the y axis is in squared response units).
    preferred : str, optional
        Model drawn thicker.
    """
    fig = go.Figure()
    ok = bins[np.isfinite(bins["gamma"].to_numpy(float))]
    pairs = ok["pairs"].to_numpy(float)
    size = 7 + 11 * np.sqrt(pairs / pairs.max()) if len(pairs) and pairs.max() > 0 else 9
    fig.add_trace(go.Scatter(
        x=ok["lag_mean"], y=ok["gamma"], mode="markers",
        name="empirical (residuals of the models' mean, OLS)",
        marker={"color": EMPIRICAL_COLOUR, "size": size, "symbol": "circle"},
        customdata=np.column_stack([ok["pairs"], ok["lag_lo"], ok["lag_hi"]]) if len(ok) else None,
        hovertemplate=(f"lag %{{customdata[1]:.3g}}–%{{customdata[2]:.3g}} {unit}<br>"
                       "semivariance %{y:.4g}<br>%{customdata[0]} pairs<extra></extra>")))
    for i, (name, part) in enumerate(curves.groupby("model", sort=False)):
        best = name == preferred
        fig.add_trace(go.Scatter(
            x=part["lag"], y=part["gamma"], mode="lines",
            name=f"{name} ★" if best else name,
            line={"color": CURVE_COLOURS[i % len(CURVE_COLOURS)], "width": 4 if best else 2,
                  "dash": "solid" if best else "dash"},
            hovertemplate=f"{name}<br>lag %{{x:.3g}} {unit}<br>fitted %{{y:.4g}}<extra></extra>"))
    fig.update_layout(
        title={"text": f"{response}: fitted semivariograms against the empirical one",
               "x": 0.01},
        xaxis_title=f"time apart ({unit})",
        yaxis_title=(f"semivariance ({response_unit})²" if response_unit
                     else f"semivariance ({response} units²)"),
        template="plotly_white", font={"size": 15}, margin={"l": 80, "r": 20, "t": 60, "b": 60},
        legend={"orientation": "h", "yanchor": "top", "y": -0.18, "x": 0},
        hovermode="closest")
    fig.update_xaxes(rangemode="tozero")
    fig.update_yaxes(rangemode="tozero", automargin=True)
    return fig


def report_figures(exploration, models, *, unit: str, response: str,
                   response_unit: str = "") -> list[tuple[str, str]]:
    """(caption, self-contained HTML) figures for the report: the semivariogram overlay."""
    import plotly.io as pio

    vg = exploration.variogram
    if models is not None and getattr(models, "panel", None) is not None:
        vg = models.residual_variogram(n_bins=len(vg.bins), max_lag=vg.max_lag)
    curves = (model_curves(models, vg.max_lag) if models is not None
              else pd.DataFrame({"model": [], "lag": [], "gamma": []}))
    fig = variogram_overlay(vg.to_frame(), curves, unit=unit, response=response,
                            response_unit=response_unit,
                            preferred=getattr(models, "preferred", None))
    snippet = pio.to_html(fig, include_plotlyjs=True, full_html=False,
                          config={"displaylogo": False}, default_height="460px")
    return [(OVERLAY_CAPTION, snippet)]


#: power-curve colours of the next-study plan
TARGET_COLOUR = "#a33b4b"
CURVE_COLOUR = "#1b6a9e"


def power_figure(made) -> go.Figure:
    """Power against the number of subjects, with the target power and the size needed."""
    curve = made.plan.to_frame()
    p = made.plan
    fig = go.Figure()
    fig.add_trace(go.Scatter(x=curve["subjects"], y=curve["power"], mode="lines+markers",
                             name=f"power under {made.model}",
                             line={"color": CURVE_COLOUR, "width": 3}, marker={"size": 5},
                             hovertemplate="%{x} subjects<br>power %{y:.3f}<extra></extra>"))
    fig.add_trace(go.Scatter(x=[curve["subjects"].min(), curve["subjects"].max()],
                             y=[made.inputs.power] * 2, mode="lines",
                             name=f"target power {made.inputs.power:g}",
                             line={"color": TARGET_COLOUR, "dash": "dash", "width": 2},
                             hoverinfo="skip"))
    fig.add_trace(go.Scatter(x=[p.subjects_needed], y=[p.achieved_power], mode="markers",
                             name=f"needed: {p.subjects_needed:,} subjects",
                             marker={"color": TARGET_COLOUR, "size": 13, "symbol": "diamond"},
                             hovertemplate="%{x} subjects<br>power %{y:.3f}<extra></extra>"))
    fig.update_layout(
        title={"text": "Power of the next study against its size", "x": 0.01},
        xaxis_title="subjects enrolled (all groups)", yaxis_title="power (probability)",
        template="plotly_white", font={"size": 15}, margin={"l": 80, "r": 20, "t": 60, "b": 60},
        legend={"orientation": "h", "yanchor": "top", "y": -0.2, "x": 0}, hovermode="closest")
    fig.update_yaxes(range=[0, 1.02])
    fig.update_xaxes(rangemode="tozero")
    return fig


def report_plan_figure(made) -> str:
    """The power curve as self-contained HTML for the report."""
    import plotly.io as pio

    return pio.to_html(power_figure(made), include_plotlyjs=True, full_html=False,
                       config={"displaylogo": False}, default_height="420px")

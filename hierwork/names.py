"""The names readers see for model parameters, one system for every page, table and message.

Inside ``posterior.nc`` the variables keep PyMC names (docs/contracts.md:
``b``, ``F__sd``, ``F__effect``, ...). Everything a person reads -- the gate
table, the traces, ``summary.csv``, ``summary.md``, the batch index, ``hierwork
compare``, the messages of ``fit`` -- uses the names of the spec instead
(README, "Parameter names"):

=====================================  ======================================
inside posterior.nc                    reader-facing name
=====================================  ======================================
``b[T]``, ``b_intercept``, ``b_slope``  ``T`` (``intercept``, ``nitrogen_kg``, ``tillage=none``)
``b_centred_intercept``                ``intercept (as sampled, predictors centred)``
``b_shifted_intercept``                ``intercept + mean group intercepts (as sampled, predictors centred)``
``b_shifted_slope[T]``                 ``T + mean group slopes (as sampled)`` (crossed factors)
``F__contrast[k, T]``, ``F__mean_z[T]``  ``F contrast k T (as sampled)``, ``F mean T (standardised, as sampled)``
``residual_sd``, ``nu``, ``dispersion``  unchanged
``F__sd[T]``                           ``F.sd`` for the first varying term, ``F.T.sd`` for the others
``F__corr[T, U]``                      ``F.corr[T,U]``
``F__chol[k]``                         ``F.cholesky[T,U]`` (element of the sampled Cholesky factor)
``F__gamma[P]``                        ``F.P`` (group-level predictor)
``F__effect[G, T]``                    ``F=G T`` (the group's offset from the population value)
``F__coef[G, T]``                      ``F=G T (coefficient as sampled)``
``F__u[G, T]``                         ``F=G T (offset as sampled)``
``F__z[G, T]``                         ``F=G T (standardised offset)``
``F__partial[G, T]``                   ``F=G T (partially non-centred offset, as sampled)``
``F__spread_sd``                       ``F.spread.sd`` (``spread: varying``)
``F__spread[G]``, ``F__spread_effect[G]``  ``F=G spread``, ``F=G spread (log offset)``
=====================================  ======================================

The first six are the prior keys of the spec. Any other internal variable is
shown with ``__`` turned into ``.`` so that no internal name reaches a reader.
"""
from __future__ import annotations

import re

import numpy as np

__all__ = ["parameter_name", "factor_terms", "element_names", "find", "readable"]

#: Group-level variables: suffix -> qualifier after ``F=G T``.
_GROUP_VALUES = {"effect": "", "coef": " (coefficient as sampled)", "u": " (offset as sampled)",
                 "z": " (standardised offset)", "partial": " (partially non-centred offset, as sampled)"}
_POPULATION = {"b", "b_intercept", "b_slope"}
_SAMPLED_POPULATION = {"b_centred_intercept", "b_shifted_intercept", "b_shifted_slope"}
_LABEL = re.compile(r"^(?P<var>[^\[\]]+?)(?:\[(?P<coords>.*)\])?$")


def parameter_name(variable: str, coords: dict, factor_terms: list | None = None) -> str:
    """The reader-facing name of one element of a posterior variable.

    Parameters
    ----------
    variable : str
        The variable's name in ``posterior.nc``.
    coords : dict
        Dimension name -> coordinate value of the element (chain and draw left out).
    factor_terms : list, optional
        The factor's varying terms in order (``F__term``), to name ``F__sd`` and
        ``F__chol`` elements by position; without it the first term is taken
        to be ``intercept``.
    """
    values = [str(v) for v in coords.values()]
    if variable in _POPULATION:
        return values[0] if values else "intercept"
    if variable == "b_centred_intercept":
        return "intercept (as sampled, predictors centred)"
    if variable == "b_shifted_intercept":
        return "intercept + mean group intercepts (as sampled, predictors centred)"
    if variable == "b_shifted_slope":
        return f"{values[0] if values else 'slope'} + mean group slopes (as sampled)"
    if "__" not in variable:
        return variable + (f"[{','.join(values)}]" if values else "")
    factor, kind = variable.split("__", 1)
    if kind == "sd" and values:
        first = factor_terms[0] if factor_terms else "intercept"
        return f"{factor}.sd" if values[0] == first else f"{factor}.{values[0]}.sd"
    if kind == "corr" and len(values) == 2:
        return f"{factor}.corr[{values[0]},{values[1]}]"
    if kind == "chol" and values and factor_terms:
        row, column = _packed_position(int(values[0]))
        if row < len(factor_terms):
            return f"{factor}.cholesky[{factor_terms[row]},{factor_terms[column]}]"
    if kind == "gamma" and values:
        return f"{factor}.{values[0]}"
    if kind == "spread_sd" and not values:
        return f"{factor}.spread.sd"
    if kind in ("spread", "spread_effect") and len(values) == 1:
        return f"{factor}={values[0]} spread" + " (log offset)" * (kind == "spread_effect")
    if kind == "contrast" and len(values) == 2:
        return f"{factor} {values[0]} {values[1]} (as sampled)"
    if kind == "mean_z" and len(values) == 1:
        return f"{factor} mean {values[0]} (standardised, as sampled)"
    if kind in _GROUP_VALUES and len(values) == 2:
        return f"{factor}={values[0]} {values[1]}{_GROUP_VALUES[kind]}"
    return f"{factor}.{kind.replace('__', '.')}" + (f"[{','.join(values)}]" if values else "")


def _packed_position(k: int) -> tuple[int, int]:
    """Row and column of element ``k`` of a lower triangle packed row by row (PyMC's LKJCholeskyCov)."""
    row = int((np.sqrt(8 * k + 1) - 1) // 2)
    return row, k - row * (row + 1) // 2


def factor_terms(posterior, variable: str) -> list | None:
    """The varying terms (``F__term``) of the factor a variable belongs to, in order; None if none."""
    if "__" not in variable:
        return None
    dim = variable.split("__", 1)[0] + "__term"
    return [str(v) for v in posterior[dim].values] if dim in posterior.coords else None


def element_names(posterior, variable: str) -> list[tuple[str, dict]]:
    """``(reader-facing name, selection)`` for every element of ``posterior[variable]``."""
    array = posterior[variable]
    dims = [d for d in array.dims if d not in ("chain", "draw")]
    terms = factor_terms(posterior, variable)
    out = []
    for index in np.ndindex(*[array.sizes[d] for d in dims]):
        selection = {d: (array[d].values[i] if d in array.coords else i) for d, i in zip(dims, index)}
        out.append((parameter_name(variable, selection, terms), selection))
    return out


def find(posterior, name: str) -> tuple[str, dict] | None:
    """The variable and selection whose reader-facing (or legacy internal) name is ``name``; None if absent."""
    name = readable(name)
    for variable in posterior.data_vars:
        if "__" in variable and not name.startswith(variable.split("__", 1)[0]):
            continue  # every name of a factor's variable starts with the factor
        for shown, selection in element_names(posterior, variable):
            if shown == name:
                return variable, selection
    return None


def readable(label) -> str | None:
    """A label of the form ``var[coord, ...]`` (diagnostics.json of older runs) in reader-facing form.

    Labels that already are reader-facing come back unchanged.
    """
    if label is None:
        return None
    text = str(label)
    match = _LABEL.match(text)
    variable = match["var"] if match else ""
    if variable not in _POPULATION | _SAMPLED_POPULATION and "__" not in variable:
        return text
    parts = [p.strip() for p in match["coords"].split(",")] if match["coords"] else []
    return parameter_name(variable, dict(enumerate(parts)))

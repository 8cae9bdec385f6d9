"""What every outcome family provides, and the per-row outcome data they share.

A family is a stateless object. Methods that take ``eta`` work on NumPy arrays
of any shape that broadcasts with the rows (``(n,)`` for one linear predictor,
``(D, m)`` for D draws of m rows); family parameters (``residual_sd``, ``nu``,
``dispersion``, ...) are passed as a dict of arrays that broadcast the same
way, e.g. ``(D, 1)``. ``eta`` never includes the log-exposure offset: families
with an exposure add it themselves, so that :meth:`Family.mean` is the outcome
per unit of exposure (or per trial) on the outcome's own scale.
"""
from __future__ import annotations

from dataclasses import dataclass, fields
from typing import ClassVar

import numpy as np


@dataclass(frozen=True)
class OutcomeRows:
    """The outcome and the family's per-row columns (NumPy arrays; None when not used).

    ``y`` is None for rows to predict. ``levels`` is not a column: the labels of
    an ordered outcome in their order (``y`` holds positions 1..K), else None.
    """

    y: np.ndarray | None
    trials: np.ndarray | None = None
    exposure: np.ndarray | None = None
    known_sd: np.ndarray | None = None
    levels: tuple | None = None

    def _columns(self):
        return [f.name for f in fields(self) if f.name != "levels"]

    @property
    def n(self) -> int:
        for name in self._columns():
            value = getattr(self, name)
            if value is not None:
                return len(value)
        return 0

    def rows(self, sl) -> "OutcomeRows":
        """The same columns restricted to ``sl`` (a slice, mask or index array)."""
        return OutcomeRows(*(None if getattr(self, name) is None else getattr(self, name)[sl]
                             for name in self._columns()), levels=self.levels)


#: Reference spread of the outcome on the logit and log scales (default priors): half a unit, that is
#: odds or rates multiplied by e^0.5 = 1.65, already a large difference between groups or conditions.
LINK_SPREAD = 0.5

#: Outcome columns a family may use: spec key under ``outcome`` -> what it holds (for messages).
COLUMN_ROLES = {"trials": "number of trials", "exposure": "exposure (log offset)",
                "known_sd": "known standard error"}


class Family:
    """Base class of the outcome families (see the package docstring).

    Class attributes
    ----------------
    name : str
        The spec's ``outcome.family``.
    link : str
        ``identity``, ``logit`` or ``log``.
    link_scale : str
        Name of the linear predictor's scale for readers (``log-odds``, ...).
    outcome_scale : str
        What :meth:`mean` is, for readers: ``probability``, ``rate`` (per unit
        of exposure) or ``outcome units``.
    columns : tuple of str
        Outcome keys (``trials``, ``exposure``, ``known_sd``) this family accepts.
    required : tuple of str
        Those of ``columns`` it needs.
    discrete : bool
        Whether outcomes are whole numbers.
    exact_normal : bool
        Normal likelihood with identity link: the exact collapsed and reduced
        paths apply.
    ordered : bool
        Outcomes are ordered levels (``outcome.levels``): the data reader
        replaces them by their positions 1..K and passes the levels in
        :attr:`OutcomeRows.levels`.
    """

    name: ClassVar[str] = ""
    link: ClassVar[str] = "identity"
    link_scale: ClassVar[str] = "outcome units"
    outcome_scale: ClassVar[str] = "outcome units"
    columns: ClassVar[tuple] = ()
    required: ClassVar[tuple] = ()
    discrete: ClassVar[bool] = False
    exact_normal: ClassVar[bool] = False
    ordered: ClassVar[bool] = False
    #: One line for ``check`` and the README: what the family models.
    summary: ClassVar[str] = ""

    #: Typical values of :meth:`parameters`, for the contract tests and examples.
    example_params: ClassVar[dict] = {}

    def example_rows(self, rng: np.random.Generator, n: int) -> OutcomeRows:
        """Plausible per-row columns (no outcome) for ``n`` rows, for the contract tests and examples."""
        return OutcomeRows(None,
                           trials=rng.integers(5, 40, n).astype(float) if "trials" in self.columns else None,
                           exposure=rng.uniform(0.5, 2.0, n) if "exposure" in self.columns else None)

    # ------------------------------------------------------------------ declaration and data

    def parameters(self, rows: OutcomeRows) -> tuple:
        """Names of the family's own parameters (priors, posterior variables), e.g. ``("residual_sd",)``."""
        return ()

    def vector_parameters(self, rows: OutcomeRows) -> dict:
        """Those of :meth:`parameters` that are vectors: name -> (dimension name, element labels).

        A vector parameter's value in ``params`` has the elements on a last extra
        axis (``(D, 1, k)`` beside ``eta`` of shape ``(D, m)``); its summary rows and
        priors are named ``name[label]`` (:func:`element_names`).
        """
        return {}

    def own_variable(self, name: str, priors: list, dims: str):
        """The PyMC variable of vector parameter ``name`` (``priors``: those :meth:`prior_names` lists)."""
        raise NotImplementedError

    def prior_names(self, name: str, rows: OutcomeRows) -> list:
        """The plan's priors of parameter ``name``: itself, or one per element of a vector parameter.

        Each prior is of one sampled variable; ``name`` and the variable may differ
        (:meth:`own_variable`), see :meth:`prior_variable`.
        """
        return [name]

    def prior_variable(self, name: str) -> str:
        """The posterior variable the priors of parameter ``name`` are the prior of (elements on its last axis)."""
        return name

    def check_data(self, rows: OutcomeRows, fail) -> None:
        """Raise through ``fail(mask, what, hint)`` for outcome rows the family cannot take.

        ``rows`` hold finite numbers (checked before); ``fail`` names the rows.
        The base class checks the shared columns: trials positive whole numbers
        at least the outcome, exposures and known SDs positive.
        """
        if rows.trials is not None:
            n = rows.trials
            bad = (n <= 0) | (n != np.round(n))
            if bad.any():
                fail(bad, "trials", "must be a positive whole number", "the number of trials is a count of 1 or more")
            if (rows.y > n).any():
                fail(rows.y > n, "outcome", "exceeds the trials",
                     "successes must be at most the number of trials")
        for role in ("exposure", "known_sd"):
            values = getattr(rows, role)
            if values is not None and (values <= 0).any():
                fail(values <= 0, role, "must be positive", f"a {COLUMN_ROLES[role]} of 0 or less is not defined")

    @staticmethod
    def check_counts(rows: OutcomeRows, fail, family: str) -> None:
        """Outcomes must be non-negative whole numbers (shared by the count families)."""
        y = rows.y
        bad = (y < 0) | (y != np.round(y))
        if bad.any():
            fail(bad, "outcome", f"must be a non-negative whole number for family {family}",
                 "counts cannot be negative or fractional")

    # ------------------------------------------------------------------ priors and parameterisation

    def link_centre_spread(self, rows: OutcomeRows) -> tuple[float, float]:
        """Centre and reference spread of the outcome on the linear predictor's scale (default priors)."""
        raise NotImplementedError

    def extra_priors(self, rows: OutcomeRows, spread: float) -> dict:
        """Default priors (name -> :class:`~hierwork.plan.priors.Prior`) of :meth:`parameters`."""
        return {}

    def working_response(self, rows: OutcomeRows) -> tuple[np.ndarray, np.ndarray | None]:
        """Per-row value and sampling variance on the link scale (None: unknown and common)."""
        raise NotImplementedError

    # ------------------------------------------------------------------ maximum likelihood (baselines)

    def offset(self, rows: OutcomeRows):
        """What the family adds to ``eta`` per row (log exposure), or 0."""
        return 0.0

    def boundary(self, rows: OutcomeRows, index: np.ndarray, n_groups: int) -> np.ndarray:
        """Groups whose separate maximum-likelihood estimate is infinite (none by default)."""
        return np.zeros(n_groups, bool)

    #: The normal equations give the estimate in one step (no reweighting).
    glm_one_step: ClassVar[bool] = False

    def glm_start(self, rows: OutcomeRows) -> np.ndarray:
        """Starting linear predictor (offset included) of the IRLS iterations."""
        raise NotImplementedError

    def glm_working(self, rows: OutcomeRows, eta: np.ndarray, state: dict) -> tuple[np.ndarray, np.ndarray]:
        """IRLS working response (offset excluded) and weights at ``eta`` (offset included)."""
        raise NotImplementedError

    def glm_update(self, rows: OutcomeRows, eta: np.ndarray, state: dict) -> dict:
        """Update nuisance parameters (dispersion, ...) after an IRLS step; returns ``state``."""
        return state

    # ------------------------------------------------------------------ model and predictions

    def likelihood(self, eta, y, rows: OutcomeRows, params: dict) -> None:
        """Add the observed variable ``y`` to the current PyMC model.

        ``eta`` is a PyTensor vector (one per row), ``y`` the outcome (a
        ``pm.Data`` container), ``params`` the family's PyMC variables.
        """
        raise NotImplementedError

    def inverse_link(self, eta):
        """The mean parameter of the link: ``eta``, ``expit(eta)`` or ``exp(eta)``."""
        from scipy import special

        return {"identity": lambda e: e, "logit": special.expit, "log": np.exp}[self.link](eta)

    def mean(self, eta, params: dict):
        """Expected outcome per unit (per trial, per unit of exposure) on the outcome's scale."""
        return self.inverse_link(eta)

    def aggregate(self, rows: OutcomeRows, cell: np.ndarray, n_cells: int):
        """Exact cell form of rows that share their linear predictor, or None if the family has none.

        Returns ``(family, cell_rows)``: the family and per-cell outcome columns
        whose likelihood, for any common ``eta`` per cell, equals the product of
        the rows' likelihoods up to a constant (so the posterior is the same).
        Only a class that sets ``exact_cells = True`` itself has one (a subclass
        changes the likelihood, so the flag is not inherited).
        """
        if not type(self).__dict__.get("exact_cells", False):
            return None
        return self.cells_of(rows, cell, n_cells)

    def cells_of(self, rows: OutcomeRows, cell: np.ndarray, n_cells: int):
        """The cell form of a family with ``exact_cells`` (see :meth:`aggregate`)."""
        raise NotImplementedError

    def information(self, eta, rows: OutcomeRows, params: dict):
        """Fisher information about ``eta`` carried by each row, ``E[-d^2 log p(y) / d eta^2]``.

        Its inverse summed over a group's rows is the group's sampling variance
        on the link scale (the pooling weight, :mod:`hierwork.results.pooling`).
        The result broadcasts against ``eta`` (it may be smaller when it does not
        depend on ``eta``). Default: the IRLS weights at ``eta`` (offset added),
        which are the information of a canonical-link family without dispersion.
        """
        return self.glm_working(rows, eta + self.offset(rows), {})[1]

    def level_columns(self, rows: OutcomeRows) -> list:
        """Extra group_estimates.csv columns of an ordered outcome, one per level (none by default)."""
        return []

    def level_probabilities(self, eta, params: dict):
        """Each level's probability on a last axis, in :meth:`level_columns` order (ordered outcomes)."""
        raise NotImplementedError

    def log_density(self, y, eta, rows: OutcomeRows, params: dict) -> np.ndarray:
        """Log density (or mass) of ``y`` given ``eta``, written from its formula."""
        raise NotImplementedError

    def simulate(self, rng: np.random.Generator, eta, rows: OutcomeRows, params: dict) -> np.ndarray:
        """One outcome per element of ``eta``."""
        raise NotImplementedError

    def reference(self, eta, rows: OutcomeRows, params: dict):
        """The same distribution as a frozen ``scipy.stats`` object (for the contract tests)."""
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"<family {self.name}>"


def element_names(name: str, labels) -> list:
    """Summary and prior names of a vector parameter's elements: ``name[label]``."""
    return [f"{name}[{label}]" for label in labels]


def sigma_of(rows: OutcomeRows, params: dict):
    """Residual SD of a normal-type family: the known per-row SDs, else ``residual_sd``."""
    return rows.known_sd if rows.known_sd is not None else params["residual_sd"]

"""PLAN: from a validated spec and data to everything the model builders need.

``families/`` (one class per outcome family), ``priors`` (the table of prior
distributions and the default rule), ``design`` (population terms, built once
and reused by ``predict``), ``parameterisation`` (centred or non-centred),
``plan`` (the :class:`~hierwork.plan.plan.ModelPlan`) and ``describe`` (its
text and ``plan.json``).
"""

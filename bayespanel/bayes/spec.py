"""What a model was specified with (not its data), saved with every posterior as JSON:
:class:`ModelSpec` for every model and :class:`LatentSpec` for the latent-effect options.
The builders write them, the posteriors read them back."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass

from .priors import Prior

__all__ = ["ModelSpec", "LatentSpec"]


@dataclass(frozen=True)
class ModelSpec:
    """How a model was specified (not the data): saved with every posterior as JSON.

    Attributes
    ----------
    model : str
        Builder name, e.g. ``"RandomIntercept"``.
    kind : str
        Design kind (``Design.matrices(kind)``).
    unit_effects : {"random", "fixed", "none"}
    likelihood : {"marginal", "latent"}
    outcome : str
    labels : tuple of str
        Coefficient labels in order.
    priors : tuple of (name, dict)
        Every prior, fully specified on the data scale.
    design : tuple of (key, value) or None
        The :class:`~bayespanel.data.design.DesignSpec` fields, when built from a panel.
    errors : {"iid", "ar1"}
        The occasion-level errors: independent, or AR(1) within units.
    """

    model: str
    kind: str
    unit_effects: str
    likelihood: str
    outcome: str
    labels: tuple
    priors: tuple
    design: tuple | None = None
    errors: str = "iid"

    @property
    def prior_dict(self) -> dict:
        return {k: Prior.from_dict(v) for k, v in self.priors}

    def to_dict(self) -> dict:
        out = {"model": self.model, "kind": self.kind, "unit_effects": self.unit_effects,
               "likelihood": self.likelihood, "outcome": self.outcome,
               "labels": list(self.labels), "priors": {k: dict(v) for k, v in self.priors},
               "design": dict(self.design) if self.design is not None else None}
        if self.errors != "iid":   # iid specifications keep the form they always had
            out["errors"] = self.errors
        return out

    def to_json(self) -> str:
        return json.dumps(self.to_dict())

    @classmethod
    def from_dict(cls, d: dict) -> "ModelSpec":
        return cls(model=d["model"], kind=d["kind"], unit_effects=d["unit_effects"],
                   likelihood=d["likelihood"], outcome=d["outcome"], labels=tuple(d["labels"]),
                   priors=tuple((k, tuple(sorted(v.items()))) for k, v in d["priors"].items()),
                   design=tuple(d["design"].items()) if d.get("design") else None,
                   errors=d.get("errors", "iid"))

    @classmethod
    def from_json(cls, text: str) -> "ModelSpec":
        return cls.from_dict(json.loads(text))




@dataclass(frozen=True)
class LatentSpec:
    """The latent-model options saved with every posterior (JSON)."""

    family: str
    link: str
    random_slopes: tuple = ()
    slope_labels: tuple = ()
    slope_centres: tuple = ()
    centred: bool = False
    trials: str | None = None
    exposure: str | None = None
    lkj_eta: float = 2.0
    extra_priors: tuple = ()

    def to_json(self) -> str:
        d = asdict(self)
        d["extra_priors"] = {k: dict(v) for k, v in self.extra_priors}
        return json.dumps(d)

    @classmethod
    def from_json(cls, text) -> "LatentSpec":
        d = json.loads(text)
        d["extra_priors"] = tuple((k, tuple(sorted(v.items()))) for k, v in d["extra_priors"].items())
        for k in ("random_slopes", "slope_labels", "slope_centres"):
            d[k] = tuple(d[k])
        return cls(**d)

    @property
    def q(self) -> int:
        return 1 + len(self.slope_labels)

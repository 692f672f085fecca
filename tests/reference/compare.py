"""Comparing a service response with the reference, field by field.

Every mismatch is collected (not just the first) so one failing seed shows
the whole picture.  Paths in messages follow the response, e.g.
``by_state/s3/steps/mean_given/win``.
"""

from __future__ import annotations

from sympy import Rational

FLOAT_TOL = 1e-9
METRICS = ("absorption", "never_absorbed", "steps", "visits")
# Keys of one parameter's sensitivity, by the metric family that brings them.
SENSITIVITY_KEYS = {
    "absorption": ("absorption", "never_absorbed"),
    "steps": ("steps_mean", "steps_variance", "steps_mean_given"),
    "visits": ("visits",),
}
SENSITIVITY_MAPS = ("absorption", "steps_mean_given", "visits")


def parse_exact(text: str) -> Rational:
    """An ``exact`` string is ``n`` or ``n/d``, reduced, with a positive denominator."""
    assert isinstance(text, str), f"exact must be a string, got {text!r}"
    num, _, den = text.partition("/")
    value = Rational(int(num), int(den)) if den else Rational(int(num))
    assert str(value) == text, f"exact {text!r} is not in lowest terms ({value})"
    return value


class Comparer:
    """Walks the reference structure and checks the response mirrors it.

    ``mode`` is "exact" (values must be equal as rationals and ``value`` the
    nearest-ish double) or "float" (values within FLOAT_TOL of the exact answer
    and no ``exact`` key).  ``variance_scale`` widens the float tolerance of a
    variance to the size of E[T]^2, the terms it is a difference of.
    """

    def __init__(self, mode: str):
        self.mode = mode
        self.errors: list[str] = []

    def number(self, path: str, got, want, scale=None) -> None:
        if want is None:
            if got is not None:
                self.errors.append(f"{path}: expected null (infinite/undefined), got {got}")
            return
        if not isinstance(got, dict) or "value" not in got:
            self.errors.append(f"{path}: expected a number object for {want}, got {got!r}")
            return
        extra = set(got) - {"value", "exact"}
        if extra:
            self.errors.append(f"{path}: unexpected keys {sorted(extra)}")
        value = got["value"]
        if not isinstance(value, (int, float)) or isinstance(value, bool):
            self.errors.append(f"{path}: value {value!r} is not a number")
            return
        if self.mode == "exact":
            if "exact" not in got:
                self.errors.append(f"{path}: exact arithmetic but no 'exact' field ({got})")
                return
            try:
                exact = parse_exact(got["exact"])
            except (AssertionError, ValueError, TypeError) as exc:
                self.errors.append(f"{path}: bad exact string: {exc}")
                return
            if exact != want:
                self.errors.append(f"{path}: exact {exact} != reference {want}")
            if abs(value - float(want)) > 1e-12 * max(1.0, abs(float(want))):
                self.errors.append(f"{path}: value {value!r} is not the double of {want}")
        else:
            if "exact" in got:
                self.errors.append(f"{path}: float arithmetic but 'exact' present ({got})")
            size = max(1.0, abs(float(want)), scale or 0.0)
            if abs(value - float(want)) > FLOAT_TOL * size:
                self.errors.append(
                    f"{path}: value {value!r} vs reference {float(want)!r} "
                    f"(|diff| {abs(value - float(want)):.3g} > {FLOAT_TOL * size:.3g})"
                )

    def number_map(self, path: str, got, want: dict) -> None:
        if not isinstance(got, dict):
            self.errors.append(f"{path}: expected an object, got {got!r}")
            return
        if set(got) != set(want):
            self.errors.append(
                f"{path}: keys {sorted(got)} != expected {sorted(want)} (every key listed)"
            )
        for key in want:
            if key in got:
                self.number(f"{path}/{key}", got[key], want[key])

    def metrics(self, path: str, got: dict, want: dict, report) -> None:
        """The four metric groups, as requested by ``report``."""
        if not isinstance(got, dict):
            self.errors.append(f"{path}: expected an object, got {got!r}")
            return
        prefix = f"{path}/" if path else ""
        if "absorption" in report:
            self._present(prefix, got, "absorption")
            self.number_map(f"{prefix}absorption", got.get("absorption"), want["absorption"])
            self._present(prefix, got, "never_absorbed")
            self.number(f"{prefix}never_absorbed", got.get("never_absorbed"), want["never_absorbed"])
        if "steps" in report:
            self._present(prefix, got, "steps")
            steps, ref = got.get("steps") or {}, want["steps"]
            if set(steps) != {"mean", "variance", "mean_given"}:
                self.errors.append(f"{prefix}steps: keys {sorted(steps)}")
            for key in ("mean", "variance"):
                if key not in steps:
                    self.errors.append(f"{prefix}steps/{key}: missing (null must be explicit)")
            mean = ref["mean"]
            self.number(f"{prefix}steps/mean", steps.get("mean"), mean)
            scale = float(mean) ** 2 if mean is not None else None
            self.number(f"{prefix}steps/variance", steps.get("variance"), ref["variance"], scale)
            self.number_map(f"{prefix}steps/mean_given", steps.get("mean_given"), ref["mean_given"])
        if "visits" in report:
            self._present(prefix, got, "visits")
            self.number_map(f"{prefix}visits", got.get("visits"), want["visits"])

    def sensitivity(self, path: str, got: dict, want: dict, report, scales=None) -> None:
        """``got["sensitivity"]`` against ``want = {name: {(key, sub): (derivative, elasticity)}}``.

        ``want`` is keyed as :func:`reference.metric_leaves` keys the metrics;
        ``scales`` optionally maps ``name -> {(key, sub): size}``, a size that
        widens the float tolerance of that derivative (as the variance's scale does above).
        """
        prefix = f"{path}/" if path else ""
        sens = got.get("sensitivity") if isinstance(got, dict) else None
        if not isinstance(sens, dict):
            self.errors.append(f"{prefix}sensitivity: expected an object, got {sens!r}")
            return
        if set(sens) != set(want):
            self.errors.append(f"{prefix}sensitivity: parameters {sorted(sens)} != {sorted(want)}")
        keys = [k for family, ks in SENSITIVITY_KEYS.items() if family in report for k in ks]
        for name, entries in want.items():
            here = f"{prefix}sensitivity/{name}"
            per = sens.get(name)
            if not isinstance(per, dict):
                self.errors.append(f"{here}: expected an object, got {per!r}")
                continue
            if set(per) != set(keys):
                self.errors.append(f"{here}: keys {sorted(per)} != expected {sorted(keys)}")
            for key in SENSITIVITY_MAPS:
                if key in keys and isinstance(per.get(key), dict):
                    subs = {sub for (k, sub) in entries if k == key}
                    if set(per[key]) != subs:
                        self.errors.append(
                            f"{here}/{key}: keys {sorted(per[key])} != expected {sorted(subs)}"
                        )
            for (key, sub), (derivative, elasticity) in entries.items():
                if key not in keys:
                    continue
                where = f"{here}/{key}" + (f"/{sub}" if sub is not None else "")
                node = per.get(key)
                if sub is not None:
                    node = node.get(sub) if isinstance(node, dict) else None
                if not isinstance(node, dict) or set(node) != {"derivative", "elasticity"}:
                    self.errors.append(
                        f"{where}: expected {{derivative, elasticity}} (nulls explicit), got {node!r}"
                    )
                    continue
                scale = (scales or {}).get(name, {}).get((key, sub))
                self.number(f"{where}/derivative", node["derivative"], derivative, scale)
                self.number(f"{where}/elasticity", node["elasticity"], elasticity)

    def _present(self, prefix: str, got: dict, key: str) -> None:
        if key not in got:
            self.errors.append(f"{prefix}{key}: missing from response")

    def response(self, got: dict, want: dict, report, by_state: bool) -> None:
        """A whole /v1/solve response: arithmetic, metrics, and by_state."""
        if got.get("arithmetic") != self.mode:
            self.errors.append(f"arithmetic: {got.get('arithmetic')!r} != {self.mode!r}")
        self.metrics("", got, want, report)
        if not isinstance(got.get("warnings", []), list):
            self.errors.append(f"warnings: not a list: {got.get('warnings')!r}")
        if by_state:
            per = got.get("by_state")
            if not isinstance(per, dict):
                self.errors.append(f"by_state: expected an object, got {per!r}")
                return
            if set(per) != set(want["by_state"]):
                self.errors.append(
                    f"by_state: keys {sorted(per)} != non-absorbing states {sorted(want['by_state'])}"
                )
            for sid, ref in want["by_state"].items():
                if sid in per:
                    self.metrics(f"by_state/{sid}", per[sid], ref, report)

    def check(self, context: str) -> None:
        assert not self.errors, (
            f"{len(self.errors)} mismatch(es) ({self.mode})\n  "
            + "\n  ".join(self.errors[:40])
            + f"\n{context}"
        )

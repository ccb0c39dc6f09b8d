"""The whole job from Python: settings, fits, comparison and report in one call.

Scenario: the built-in simulated clinic panel (true values known). The same settings
object is what ``bayespanel fit`` builds from its options; the output folder gets
results.json, analysis.toml, posteriors/, tables/ and report.html.

Run: python examples/run_and_report.py [OUTPUT_FOLDER]
"""

import sys
import warnings

import bayespanel as bp
from bayespanel.app.runner import Settings, run

try:
    from _common import sampling
except ImportError:
    from examples._common import sampling


def main(out="clinic-report"):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        df, truth = bp.datasets.clinic_panel(seed=2026)
    s = sampling()
    settings = Settings(unit="clinic", time="quarter", formula=truth["formula"],
                        models=("within_between", "fixed_effects"),
                        reference=("within", "random", "within_between"),
                        draws=s["draws"], tune=s["tune"], chains=s["chains"], seed=s["seed"],
                        priors={"sigma_unit": "gamma2"}, rope=0.5)
    results = run(settings, df=df, out=out, truth=truth)
    wb = next(m for m in results["models"] if m["name"] == "within_between")
    for c in wb["coefficients"]:
        print(f"{c['term']:<22} {c['estimate']:8.3f}  [{c['lower']:.3f}, {c['upper']:.3f}]")
    print(f"report: {out}/report.html")
    return results


if __name__ == "__main__":
    main(*(sys.argv[1:2] or ["clinic-report"]))

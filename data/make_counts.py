"""Write data/demo_counts.csv and data/demo_fit.toml: invented survey counts for the demo.

    python data/make_counts.py

Deterministic (seed 20261203, no clock). Forty patches of the invented demo landscape are
"surveyed" yearly from t = 0 to 20, with about one year in six missed at random; each count is
negative binomial (dispersion 10) around the abundance of the demo's deterministic run with
rates that differ from those typed into ``demo.toml`` (growth 1.2 instead of 1.0, attack 0.04
instead of 0.05, predator mortality 0.45 instead of 0.4), so that ``trophoscape fit`` has
something to find. For the demo only: no real survey lies behind these numbers.
"""

from pathlib import Path

import numpy as np

from trophoscape.workflows.fitting import Counts, expected_counts, searched_study
from trophoscape.workflows.study import load_study

HERE = Path(__file__).resolve().parent
RNG = np.random.default_rng(20261203)
#: The invented "true" rates the counts are drawn around.
DRAWN_FROM = {"prey.growth_rate": 1.2, "predation.attack_rate": 0.04,
              "predator.mortality_rate": 0.45}
DISPERSION = 10.0
SURVEYED = 40
YEARS = 20

FIT_SECTION = """
[fit]
# the values to estimate from data/demo_counts.csv (trophoscape fit), each between bounds
estimate = ["prey.growth_rate", "predation.attack_rate", "predator.mortality_rate"]
observation = "negative_binomial"   # counts scatter more than Poisson around the expectation
bounds = { "prey.growth_rate" = [0.2, 5.0], "predation.attack_rate" = [0.005, 0.5], "predator.mortality_rate" = [0.05, 2.0] }
"""


def main():
    study = load_study(HERE / "demo.toml")
    n = study.landscape.n_patches
    surveyed = np.sort(RNG.choice(n, SURVEYED, replace=False))
    p, t, s = np.meshgrid(surveyed, np.arange(YEARS + 1.0), [0, 1], indexing="ij")
    p, t, s = p.ravel(), t.ravel(), s.ravel()
    # a visit is missed as a whole: both species absent that year
    missed = RNG.uniform(size=(SURVEYED, YEARS + 1)) < 1 / 6
    keep = ~np.repeat(missed.ravel(), 2)
    p, t, s = p[keep], t[keep], s[keep]
    frame = Counts(patch=p, time=t, species=s, count=np.zeros(p.size))
    mean = expected_counts(searched_study(study, DRAWN_FROM), frame)
    count = RNG.negative_binomial(DISPERSION, DISPERSION / (DISPERSION + mean))
    ids = np.asarray(study.ids, dtype=str)
    lines = ["patch_id,time,species,count"] + [
        f"{ids[a]},{b:g},{'predator' if c else 'prey'},{d}" for a, b, c, d in zip(p, t, s, count)]
    (HERE / "demo_counts.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    text = (HERE / "demo.toml").read_text(encoding="utf-8")
    head = ("# The demo scenario with a [fit] section, for trophoscape fit with "
            "data/demo_counts.csv\n# (written by data/make_counts.py; the rest is demo.toml).\n")
    (HERE / "demo_fit.toml").write_text(head + text.rstrip("\n") + "\n" + FIT_SECTION,
                                        encoding="utf-8")
    print(f"wrote {len(lines) - 1} counts of {SURVEYED} patches and demo_fit.toml")


if __name__ == "__main__":
    main()

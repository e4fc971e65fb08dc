"""Cost of certified predictions (docs/theory.md section 10) at the demo's size.

Model and data: ``configs/demo.toml`` (120 sensors, features (1, 16, 16),
K = 5 Chebyshev taps, per-node readout to 3 classes), parameters at their
initialisation (the cost does not depend on their values).

Timed, interleaved round by round:
- ``epoch certificate`` (the reference): what the trainer already computes
  every epoch, the model certificate over the spectral interval
  (``Trainer.certificate``);
- ``val certified acc``: what this adds every epoch, a float64 forward pass
  on the validation signals and the margin test against that certificate
  (``training_predictions``);
- ``radius evaluation``: one of the (at most 20) evaluations of the
  certified radius in ``stablefilt certify``, the input-specific bound of
  every test signal at one eps without refinement.

    python benchmarks/bench_predictions.py [--rounds 5]

Figures are medians over rounds; ratios are medians of per-round ratios
against the epoch certificate [quartiles]. Nothing here is a timed assertion.
"""

from __future__ import annotations

import argparse
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import jax  # noqa: E402
from _common import interleaved, ms, ratio, spread  # noqa: E402

jax.config.update("jax_enable_x64", True)

from stablefilt import load_config  # noqa: E402
from stablefilt._model import init_params  # noqa: E402
from stablefilt._modelcert import certify_inputs, model_constants  # noqa: E402
from stablefilt._predictions import training_predictions  # noqa: E402
from stablefilt._train import Trainer  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    tr = Trainer.from_config(load_config(os.path.join(ROOT, "configs", "demo.toml")))
    params = init_params(tr.spec, 0)
    d = tr.data
    cert = tr.certificate(params)
    constants = model_constants(params, tr.spec, tr.interval, d.op.nodes, None, matrix=d.op.matrix)
    xt = d.x[d.test]
    methods = {
        "epoch certificate": lambda: tr.certificate(params),
        "val certified acc": lambda: training_predictions(params, tr.spec, d.op.matrix, d.x[d.val], d.y[d.val],
                                                          "classify", cert),
        "radius evaluation": lambda: certify_inputs(params, tr.spec, d.op.matrix, tr.interval, xt, 1e-3,
                                                    constants=constants),
    }
    times = interleaved(methods, args.rounds, samples=1, target=0.0)
    print(f"demo size: N = {d.op.nodes}, {len(d.val)} validation and {len(d.test)} test signals; "
          f"load average {os.getloadavg()[0]:.2f}")
    for name in methods:
        q = spread(times, name, "epoch certificate")
        print(f"  {name:20s} median {ms(times[name]):9.1f} ms   x{ratio(times, name, 'epoch certificate'):.3g} "
              f"of the epoch certificate [{q[0]:.3g}, {q[1]:.3g}]")
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Weight-heaviness screen (issue 10, fifth round; rejected as a discriminator; harness as in
README.md of this folder): per cached replicate, the Kish effective sample size (as a share of
the arm) and the largest weight share of the observed-arm inverse weights in each arm, for the
riesz search without the column (r05), the column search (v0.5) and PLS. Rows:
``results/default_choice_weight_heaviness_seed{2007,2027}.csv``."""

from __future__ import annotations
import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import sys, warnings
import numpy as np
import screen, screen_extra
from screen_contrast import cached_main, replicate_setup


def feats(w, A):
    out = {}
    for arm, m in (("1", A == 1), ("0", A == 0)):
        ww = w[m]
        out["ess" + arm] = float(ww.sum() ** 2 / (ww**2).sum() / m.sum())
        out["max" + arm] = float(ww.max() / ww.sum())
    return out


def row(cell, rep):
    _, res, an, inp, main_row = replicate_setup(cell, rep)
    A = np.asarray(res.data.A).ravel()
    out = {"cell": cell, "rep": rep}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ws = {
            "r05": screen.observed_arm_weights(inp, main_row.alpha, "riesz"),
            "pls": screen.observed_arm_weights(inp, an.stack_alpha, "probability"),
        }
        a, b, _, _, inp_aug = screen_extra.pls_vertex_riesz(an, 0.5)
        ws["v0.5"] = screen.observed_arm_weights(inp_aug, a, "riesz")
        for k, w in ws.items():
            for f, v in feats(w, A).items():
                out[f"{f}_{k}"] = v
        out["alpha_r05"] = " ".join(f"{x:.3f}" for x in main_row.alpha)
        out["alpha_pls"] = " ".join(f"{x:.3f}" for x in an.stack_alpha)
    return out


if __name__ == "__main__":
    sys.exit(cached_main(row, "weight_heaviness"))

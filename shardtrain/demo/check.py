"""The demo's proof: the partitioned run against the single-process reference (every
epoch's loss and the final weights, relative `RTOL`) and the measured payload against the
survey's prediction, byte for byte."""
from __future__ import annotations

import numpy as np

from shardtrain.demo.settings import RTOL
from shardtrain.errors import RunError


def _relative(got: float, want: float) -> float:
    scale = abs(want)
    return abs(got - want) / scale if scale > 0 else abs(got - want)


def compare_runs(run, ref, survey_plan: dict, epochs: int) -> dict:
    """The check: every epoch's loss and the final weights of the partitioned run against
    the reference, relative to the reference (weights: max |difference| over the array's
    max |value|, as tests/test_train_equivalence.py measures), and the measured payload
    against the survey's prediction for this plan (and the run's own)."""
    from shardtrain.plan.survey import predict_run_payload
    from shardtrain.train import model

    if len(run.epochs) != len(ref.epochs):
        raise RunError(f"the partitioned run reported {len(run.epochs)} epochs, the "
                       f"reference {len(ref.epochs)}")
    loss_rel = [_relative(a["loss"], b["loss"]) for a, b in zip(run.epochs, ref.epochs)]
    got_w, want_w = model.params_to_arrays(run.params), model.params_to_arrays(ref.params)
    weight_rel = {}
    for name, w in want_w.items():
        scale = float(np.max(np.abs(w))) if w.size else 0.0
        diff = float(np.max(np.abs(got_w[name] - w))) if w.size else 0.0
        weight_rel[name] = diff / scale if scale > 0 else diff
    worst_epoch = int(np.argmax(loss_rel)) + 1
    max_loss = float(max(loss_rel))
    max_weight = float(max(weight_rel.values()))
    measured = int(run.traffic["measured_payload_bytes"])
    predicted_run = int(run.traffic["predicted_payload_bytes"])
    predicted_survey = predict_run_payload(survey_plan["traffic"], epochs, epochs)
    equal = max_loss <= RTOL and max_weight <= RTOL
    bytes_equal = measured == predicted_survey == predicted_run
    return {
        "rtol": RTOL,
        "epochs_compared": len(loss_rel),
        "max_loss_rel_diff": max_loss,
        "worst_loss_epoch": worst_epoch,
        "max_weight_rel_diff": max_weight,
        "weight_rel_diff": weight_rel,
        "max_rel_diff": max(max_loss, max_weight),
        "predictions_agree": bool(np.array_equal(run.predictions, ref.predictions)),
        "reference_final_loss": ref.epochs[-1]["loss"],
        "partitioned_final_loss": run.epochs[-1]["loss"],
        "equal_to_reference": bool(equal),
        "measured_payload_bytes": measured,
        "predicted_payload_bytes": predicted_survey,
        "run_predicted_payload_bytes": predicted_run,
        "breakdown_matches": bool(run.traffic.get("breakdown_matches", bytes_equal)),
        "payload_equal": bool(bytes_equal),
        "passed": bool(equal and bytes_equal),
    }


def check_failure(check: dict) -> str | None:
    """The RunError message of a failed check, with its numbers; None when it passed."""
    problems = []
    if not check["equal_to_reference"]:
        problems.append(f"partitioned training differs from the reference: max relative "
                        f"difference {check['max_loss_rel_diff']:.3e} in the loss (epoch "
                        f"{check['worst_loss_epoch']}), {check['max_weight_rel_diff']:.3e} in "
                        f"the weights (allowed {check['rtol']:g})")
    if not check["payload_equal"]:
        problems.append(f"measured payload {check['measured_payload_bytes']:,} bytes, survey "
                        f"predicted {check['predicted_payload_bytes']:,} bytes, run predicted "
                        f"{check['run_predicted_payload_bytes']:,} bytes")
    return "; ".join(problems) or None

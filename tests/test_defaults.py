"""Option defaults live in `shardtrain.defaults` only: the settings values and every
command's parser take them from there."""
from __future__ import annotations

from dataclasses import asdict

from shardtrain import defaults as d
from shardtrain.cli import build_parser
from shardtrain.demo.workflow import DemoSettings
from shardtrain.plan.survey import SurveySettings
from shardtrain.train.settings import TrainSettings


def test_training_defaults_are_the_gcn_papers():
    # Kipf & Welling, ICLR 2017, section 5.1 (from memory): 2 layers, 16 hidden units,
    # dropout 0.5, learning rate 0.01, L2 5e-4 on the first layer, 200 epochs
    assert (d.LAYERS, d.HIDDEN, d.DROPOUT, d.LR, d.WEIGHT_DECAY, d.EPOCHS) == (
        2, 16, 0.5, 0.01, 5e-4, 200)
    assert asdict(TrainSettings()) == {
        "layers": d.LAYERS, "hidden": d.HIDDEN, "dropout": d.DROPOUT, "lr": d.LR,
        "weight_decay": d.WEIGHT_DECAY, "epochs": d.EPOCHS, "seed": d.SEED, "dtype": d.DTYPE,
        "bias": d.BIAS, "early_stop": d.EARLY_STOP, "threads": d.THREADS, "model": d.MODEL,
        "heads": d.HEADS, "halo_keep": d.HALO_KEEP, "halo_format": d.HALO_FORMAT,
        "halo_stale": d.HALO_STALE, "halo_smooth": d.HALO_SMOOTH}
    # the model family's defaults: GCN as before; GAT's 8 heads on hidden layers
    # (Velickovic et al., ICLR 2018, transductive setup, from memory)
    assert (d.MODEL, d.HEADS) == ("gcn", 8)
    # halo schemes off by default: every halo row, in the training dtype, synchronous
    assert (d.HALO_KEEP, d.HALO_FORMAT, d.HALO_STALE, d.HALO_SMOOTH) == (1.0, None, False,
                                                                         0.0)


def test_settings_values_read_the_defaults():
    s = SurveySettings()
    assert (s.layers, s.hidden, s.dtype, s.bias, s.imbalance, s.seed) == (
        d.LAYERS, d.HIDDEN, d.DTYPE, d.BIAS, d.IMBALANCE, d.SEED)
    demo = DemoSettings()
    assert (demo.out, demo.vertices, demo.workers, demo.epochs, demo.seed) == (
        d.DEMO_OUT, d.DEMO_VERTICES, d.DEMO_WORKERS, d.DEMO_EPOCHS, d.SEED)
    assert (demo.avg_degree, demo.classes, demo.features, demo.latency_us) == (
        d.SYNTH_AVG_DEGREE, d.SYNTH_CLASSES, d.SYNTH_FEATURES, d.LATENCY_US)
    assert demo.survey_workers == d.SURVEY_WORKERS and demo.links_gbps == d.DEMO_LINKS_GBPS


def _defaults_of(command: str) -> dict:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    return {a.dest: a.default for a in sub.choices[command]._actions}


def test_parsers_take_the_defaults():
    survey = _defaults_of("survey")
    assert (survey["layers"], survey["hidden"], survey["dtype"], survey["imbalance"],
            survey["seed"]) == (d.LAYERS, d.HIDDEN, d.DTYPE, d.IMBALANCE, d.SEED)
    forecast = _defaults_of("forecast")
    assert forecast["link_gbps"] == d.listed(d.LINK_PRESETS_GBPS) == "1,10,25,100"
    assert (forecast["latency_us"], forecast["speed_factor"], forecast["dropout"]) == (
        d.LATENCY_US, d.SPEED_FACTOR, d.DROPOUT)
    synth = _defaults_of("synth")
    assert (synth["vertices"], synth["avg_degree"], synth["classes"], synth["features"],
            synth["homophily"], synth["degree_exponent"], synth["signal"]) == (
        d.SYNTH_VERTICES, d.SYNTH_AVG_DEGREE, d.SYNTH_CLASSES, d.SYNTH_FEATURES,
        d.HOMOPHILY, d.DEGREE_EXPONENT, d.SIGNAL)
    assert _defaults_of("split")["imbalance"] == d.IMBALANCE
    demo = _defaults_of("demo")
    assert (demo["out"], demo["workers"], demo["seed"]) == (d.DEMO_OUT, d.DEMO_WORKERS, d.SEED)
    train = _defaults_of("train")
    assert (train["layers"], train["hidden"], train["dropout"], train["lr"],
            train["epochs"]) == (d.LAYERS, d.HIDDEN, d.DROPOUT, d.LR, d.EPOCHS)


def test_listed():
    assert d.listed((2, 4, 8)) == "2,4,8" and d.listed((1.0, 10.0, 0.5)) == "1,10,0.5"

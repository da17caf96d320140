"""Every option default, in one place: the library's settings values and the commands'
`--help` read them from here (a default written twice drifts).

Model and training: the GCN paper's setup (Kipf & Welling, ICLR 2017): 2 layers, 16 hidden
units, dropout 0.5, learning rate 0.01, weight decay 5e-4 on the first layer, 200 epochs,
no bias. `EARLY_STOP` (patience, 0 = off) and `THREADS` (BLAS threads per process: the
workers are the parallelism) are the tool's own.
"""
from __future__ import annotations

# model and training (train.settings.TrainSettings, plan.survey.SurveySettings, the CLI)
LAYERS = 2
HIDDEN = 16
DROPOUT = 0.5
LR = 0.01
WEIGHT_DECAY = 5e-4
EPOCHS = 200
SEED = 0
DTYPE = "float32"
BIAS = False
EARLY_STOP = 0
THREADS = 1
MODEL = "gcn"                          # plan.schedule.MODELS: gcn, sage, gin, gat
HEADS = 8                              # GAT heads per hidden layer (Velickovic et al. 2018)
# halo schemes (plan.schemes.HaloScheme): every halo row kept, in the training dtype (exact)
HALO_KEEP = 1.0
HALO_FORMAT: str | None = None
HALO_STALE = False          # synchronous halo exchanges
HALO_SMOOTH = 0.0           # no moving average of stale halo rows

# a training run (train.api.RunConfig, train.session, cli/train.py)
TRANSPORT = "pipes"                    # worker processes on this machine
TIMEOUT_S = 60.0                       # deadline of every halo/all-reduce receive
CHECKPOINT_EVERY = 10                  # epochs between checkpoints

# partition plans (plan.partition, survey, split, forecast)
IMBALANCE = 0.03                       # METIS load imbalance tolerance
# what a survey or forecast compares unless told otherwise: metis-volume is left out because
# it takes minutes per plan on million-vertex power-law graphs (see its docstring), and
# metis-balanced because `metis` already takes its plan where that costs little
COMPARED_METHODS = ("metis", "fennel", "random", "range")
SURVEY_WORKERS = (2, 4, 8)
FORECAST_WORKERS = (2, 4, 8, 16)

# forecast (forecast.projection, cli/forecast.py, the demo)
LINK_PRESETS_GBPS = (1.0, 10.0, 25.0, 100.0)
LATENCY_US = 20.0                      # one-way latency of a switched data-centre LAN
SPEED_FACTOR = 1.0

# synth: the parcel-delivery network (data.synth, cli/synth.py, the demo's network)
SYNTH_VERTICES = 10_000
SYNTH_AVG_DEGREE = 10.0
SYNTH_CLASSES = 6
SYNTH_FEATURES = 32
SYNTH_GROWTH = 0.05                     # synth --grow: new depots per week, share of n
HOMOPHILY = 0.8
DEGREE_EXPONENT = 2.5
SIGNAL = 1.5

# demo: the full-size run takes well under 2 minutes on a busy 2-core machine; --quick is
# tiny, for tests
DEMO_OUT = "shardtrain-demo"
DEMO_VERTICES = 20_000
DEMO_EPOCHS = 100
DEMO_WORKERS = 4
DEMO_QUICK_VERTICES = 600
DEMO_QUICK_EPOCHS = 5
DEMO_METHODS = ("metis", "metis-volume", "fennel", "random", "range")
DEMO_LINKS_GBPS = (1.0, 10.0)


def listed(values) -> str:
    """(2, 4, 8) -> '2,4,8' and (1.0, 10.0) -> '1,10': a list default as an option takes it."""
    return ",".join(f"{v:g}" if isinstance(v, float) else str(v) for v in values)

# calibrate --spec-out: the network of the written spec (this machine's is not measured)
SPEC_NETWORK_GBPS = 10.0

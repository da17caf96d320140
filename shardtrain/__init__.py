"""shardtrain: plan, measure and run partitioned multi-process GCN training on one CPU."""

__version__ = "0.1.0"

"""The message-passing models beside GCN (whose maths stays in `train/model.py`).

One module per model, each with `forward(params, x, hops, propagate, drop, local)` and
`backward(params, cache, dlogits, hops, propagate_t)`; `train/model.py` dispatches on
`hops[0].model`. Like GCN they see the graph only through what they are handed:
- sage, gin: `propagate(l, M)` = P [M; M_halo] and `propagate_t(l, G)` = owned rows of Pᵀ G
  summed over processes, with P the model's operator (`common.operator_matrix`);
- gat: `propagate(l, M)` = [M; M_halo] (the owned rows, then the halo rows) and
  `propagate_t(l, G)` = the owned rows of G summed over every process holding them,
  plus the local structure (`common.LocalGraph`).
The reference hands them full-graph products, the worker exchange + local products.
"""

"""The learned core in PyTorch: one message-passing graph network over particle neighbourhoods.

Our own small design in the encode-process-decode family (Battaglia et al.
2018, "Relational inductive biases, deep learning, and graph networks",
arXiv:1806.01261; Sanchez-Gonzalez et al. 2020, "Learning to Simulate Complex
Physics with Graph Networks", ICML). One network handles everything -- free
flight, pressure, walls and colliders -- there are no separate learned parts.

- Encoder: node features (8, the learned step among them) -> latent h (L) by a 2-layer MLP.
- R rounds, unshared weights. Each round sums messages from fluid neighbours
  and from boundary particles over the dense padded tables:
      m_i  = W2 * (1/K0) sum_j mask_ij relu(A h_i + B h_j + C e_ij + b) + b2 * deg_i
      mb_i = W2b * (1/K0) sum_b maskb_ib relu(Ab h_i + Cb f_ib + bb) + b2b * degb_i
      h_i <- h_i + LayerNorm(MLP([h_i, m_i, mb_i]))
  mb_i is computed only for the Nb particles that have boundary neighbours
  (``boundary_rows``) and gathered back to all N with ``boundary_slot``
  (an appended zero row serves the rest): in a splash most particles touch no
  wall, and the boundary branch was 32 of the 80 padded slots per particle.
  The first edge layer is factorised (A h_i and B h_j are node-level products,
  gathered afterwards) and the second, linear, edge layer is applied after the
  sum, as measured fastest on this CPU (shared/docs/learned-surrogate.md).
  Aggregation is a masked ReduceSum -- no scatter ops, which onnxruntime got
  wrong in our export tests.
- Decoder: 2-layer MLP, latent -> 3 (normalised non-gravity acceleration).

Permutation invariance: sums over neighbours; translation invariance: only
position differences enter (engine.learned.features).
"""

import torch
from torch import nn

from engine.learned import features

#: Normalising count of the neighbour sums (about the mean neighbour count at R = 2 d).
NEIGHBOUR_SCALE = 1.0 / 30.0


def _mlp(inputs, hidden, outputs):
    return nn.Sequential(nn.Linear(inputs, hidden), nn.ReLU(), nn.Linear(hidden, outputs))


class Round(nn.Module):
    """One message-passing round (see the module docstring)."""

    def __init__(self, latent, edge_features, boundary_features):
        super().__init__()
        self.receiver = nn.Linear(latent, latent)
        self.sender = nn.Linear(latent, latent, bias=False)
        self.edge = nn.Linear(edge_features, latent, bias=False)
        self.message = nn.Linear(latent, latent)
        self.boundary_receiver = nn.Linear(latent, latent)
        self.boundary_edge = nn.Linear(boundary_features, latent, bias=False)
        self.boundary_message = nn.Linear(latent, latent)
        self.update = _mlp(3 * latent, latent, latent)
        self.norm = nn.LayerNorm(latent)

    def forward(self, h, neighbour_index, neighbour_mask, edge_features, boundary_rows, boundary_slot,
                boundary_features, boundary_mask) -> torch.Tensor:
        pre = self.receiver(h).unsqueeze(1) + self.sender(h)[neighbour_index] + self.edge(edge_features)
        summed = (torch.relu(pre) * neighbour_mask.unsqueeze(-1)).sum(dim=1) * NEIGHBOUR_SCALE
        degree = neighbour_mask.sum(dim=1, keepdim=True) * NEIGHBOUR_SCALE
        fluid = summed @ self.message.weight.t() + degree * self.message.bias
        bpre = self.boundary_receiver(h[boundary_rows]).unsqueeze(1) + self.boundary_edge(boundary_features)
        bsummed = (torch.relu(bpre) * boundary_mask.unsqueeze(-1)).sum(dim=1) * NEIGHBOUR_SCALE
        bdegree = boundary_mask.sum(dim=1, keepdim=True) * NEIGHBOUR_SCALE
        wall = bsummed @ self.boundary_message.weight.t() + bdegree * self.boundary_message.bias
        wall = torch.cat([wall, torch.zeros(1, wall.shape[1], dtype=wall.dtype)])[boundary_slot]
        return h + self.norm(self.update(torch.cat([h, fluid, wall], dim=1)))


class GraphCore(nn.Module):
    """The learned core: inputs and output as in engine.learned.contract (normalised)."""

    def __init__(self, latent=32, rounds=2):
        super().__init__()
        self.latent = int(latent)
        self.rounds = int(rounds)
        self.encoder = _mlp(features.NODE_FEATURES, latent, latent)
        self.encoder_norm = nn.LayerNorm(latent)
        self.blocks = nn.ModuleList(
            [Round(latent, features.EDGE_FEATURES, features.BOUNDARY_FEATURES) for _ in range(rounds)]
        )
        self.decoder = _mlp(latent, latent, 3)

    def forward(self, node_features, neighbour_index, neighbour_mask, edge_features, boundary_rows, boundary_slot,
                boundary_features, boundary_mask) -> torch.Tensor:
        h = self.encoder_norm(self.encoder(node_features))
        for block in self.blocks:
            h = block(h, neighbour_index, neighbour_mask, edge_features, boundary_rows, boundary_slot,
                      boundary_features, boundary_mask)
        return self.decoder(h)


INPUT_ORDER = ("node_features", "neighbour_index", "neighbour_mask", "edge_features", "boundary_rows",
               "boundary_slot", "boundary_features", "boundary_mask")


def as_tensors(inputs) -> tuple[torch.Tensor, ...]:
    """dict of numpy core inputs -> tuple of tensors in ONNX input order."""
    return tuple(torch.from_numpy(inputs[name]) for name in INPUT_ORDER)


def export_onnx(model, path, example_inputs, opset=17) -> None:
    """Export ``model`` to ONNX with dynamic N, K, Nb, Kb (legacy TorchScript exporter, no scatter ops).

    Args:
        model: GraphCore (put in eval mode here).
        path: output .onnx path.
        example_inputs: dict of numpy core inputs used for tracing.
    """
    model.eval()
    dynamic = {
        "node_features": {0: "N"},
        "neighbour_index": {0: "N", 1: "K"},
        "neighbour_mask": {0: "N", 1: "K"},
        "edge_features": {0: "N", 1: "K"},
        "boundary_rows": {0: "Nb"},
        "boundary_slot": {0: "N"},
        "boundary_features": {0: "Nb", 1: "Kb"},
        "boundary_mask": {0: "Nb", 1: "Kb"},
        "non_gravity_acceleration": {0: "N"},
    }
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(
            model, as_tensors(example_inputs), str(path), input_names=list(INPUT_ORDER),
            output_names=["non_gravity_acceleration"], dynamic_axes=dynamic, opset_version=opset, dynamo=False,
        )  # fmt: skip

"""A small residual network for the synthetic kiln records, trained by recipes/own_network.toml:
an example of a network of your own (model.kind = "python"). Written for this project's
examples; the kiln data it learns from are invented (data/make_kiln_batches.py).

The contract: a torch.nn.Module whose constructor takes the recipe's [model.args] as keyword
arguments, and whose forward takes float32 rows as the data gives them, (batch, features),
and returns (batch, classes) logits. The file may import installed packages only.
"""

from torch import nn


class Block(nn.Module):
    """x + dropout(relu(linear(layer_norm(x)))): a pre-norm residual block."""

    def __init__(self, width: int, dropout: float):
        super().__init__()
        self.norm = nn.LayerNorm(width)
        self.linear = nn.Linear(width, width)
        self.act = nn.ReLU()
        self.drop = nn.Dropout(dropout)

    def forward(self, x):
        return x + self.drop(self.act(self.linear(self.norm(x))))


class ResidualNet(nn.Module):
    def __init__(self, features: int, classes: int, width: int = 32, blocks: int = 2, dropout: float = 0.0):
        super().__init__()
        self.stem = nn.Linear(features, width)
        self.blocks = nn.Sequential(*[Block(width, dropout) for _ in range(blocks)])
        self.head = nn.Linear(width, classes)

    def forward(self, x):
        return self.head(self.blocks(self.stem(x)))

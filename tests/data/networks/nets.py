"""Networks for the tests of model.kind = "python" (tests/test_user_module.py and
tests/test_stacked_modules.py). Test fixtures, written for these tests."""

import torch
from torch import nn

ACTIVATIONS = {"relu": nn.ReLU, "tanh": nn.Tanh, "sigmoid": nn.Sigmoid}


class Dense(nn.Module):
    """The tool's MLP (model.kind = "mlp") written by hand, layer for layer."""

    def __init__(self, widths, activation="relu", p=0.0, input_p=0.0, batch_norm=False):
        super().__init__()
        layers = [nn.Dropout(input_p)] if input_p > 0 else []
        layers.append(nn.Flatten())
        for a, b in zip(widths[:-2], widths[1:-1]):
            layers.append(nn.Linear(a, b))
            if batch_norm:
                layers.append(nn.BatchNorm1d(b))
            layers.append(ACTIVATIONS[activation]())
            if p > 0:
                layers.append(nn.Dropout(p))
        layers.append(nn.Linear(widths[-2], widths[-1]))
        self.net = nn.Sequential(*layers)

    def forward(self, x):
        return self.net(x)


class Conv(nn.Module):
    """The tool's CNN (model.kind = "cnn", max pooling, square images) written by hand."""

    def __init__(self, channels, hidden, classes, size=8, kernel=3, batch_norm=False):
        super().__init__()
        layers, c_in = [], 1
        for c in channels:
            layers.append(nn.Conv2d(c_in, c, kernel, padding=kernel // 2))
            layers += [nn.BatchNorm2d(c), nn.ReLU()] if batch_norm else [nn.ReLU()]
            if size >= 2:
                layers.append(nn.MaxPool2d(2))
                size //= 2
            c_in = c
        layers.append(nn.Flatten())
        width = c_in * size * size
        for h in hidden:
            layers += [nn.Linear(width, h), nn.ReLU()]
            width = h
        layers.append(nn.Linear(width, classes))
        self.net = nn.Sequential(*layers)

    def forward(self, x):
        return self.net(x)


class Reversed(nn.Module):
    """Layers defined in the reverse of the order forward calls them, two kinds of activation."""

    def __init__(self, n_in, width, n_out):
        super().__init__()
        self.head = nn.Linear(width, n_out)
        self.mid = nn.Linear(width, width)
        self.first = nn.Linear(n_in, width)
        self.relu = nn.ReLU()
        self.tanh = nn.Tanh()

    def forward(self, x):
        return self.head(self.tanh(self.mid(self.relu(self.first(x.flatten(1))))))


class Mixed(nn.Module):
    """Layers the tool initializes (Linear, Conv1d) and layers that keep their own init
    (LayerNorm, a bare parameter), one Linear without bias."""

    def __init__(self, n_in, n_out):
        super().__init__()
        self.conv = nn.Conv1d(1, 2, 3, padding=1)
        self.norm = nn.LayerNorm(2 * n_in)
        self.scale = nn.Parameter(torch.full((1,), 0.5))
        self.hidden = nn.Linear(2 * n_in, 8, bias=False)
        self.out = nn.Linear(8, n_out)

    def forward(self, x):
        h = self.norm(self.conv(x.unsqueeze(1)).flatten(1)) * self.scale
        return self.out(torch.relu(self.hidden(h)))


class Noisy(nn.Module):
    """Draws random numbers in forward while training (input noise), not through nn.Dropout."""

    def __init__(self, n_in, n_out):
        super().__init__()
        self.lin = nn.Linear(n_in, n_out)

    def forward(self, x):
        if self.training:
            x = x + 0.1 * torch.randn_like(x)
        return self.lin(x)


class Flat(nn.Module):
    """Returns (batch,) instead of (batch, 1) for regression."""

    def __init__(self, n_in):
        super().__init__()
        self.lin = nn.Linear(n_in, 1)

    def forward(self, x):
        return self.lin(x).squeeze(1)


class Detached(nn.Module):
    def __init__(self, n_in, n_out):
        super().__init__()
        self.lin = nn.Linear(n_in, n_out)

    def forward(self, x):
        return self.lin(x).detach()


class Picky(nn.Module):
    def __init__(self, depth):
        super().__init__()
        if depth < 1:
            raise ValueError(f"depth must be at least 1, got {depth}")
        self.lin = nn.Linear(4, 3)

    def forward(self, x):
        return self.lin(x)


class NotANetwork:
    pass

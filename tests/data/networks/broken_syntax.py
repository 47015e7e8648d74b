from torch import nn


class Net(nn.Module):
    def __init__(self)
        super().__init__()

import torch

layer = nn.Linear(4, 3)


class Net(torch.nn.Module):
    pass

"""The plain-torch counterpart of `scaledrill run train.steps=1` (the start-up baseline).

What a user would write for the same job, and nothing else: import torch, load
the digits set the way the task does (scikit-learn's bundled copy, the same
stratified split), build the same CNN with stock BatchNorm2d, take one SGD step
at the default global batch (B = 128) and evaluate the test loss and accuracy,
as the run's summary does.
"""

import torch
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from torch import nn


def main() -> None:
    torch.manual_seed(0)
    images, labels = load_digits(return_X_y=True)
    train_idx, test_idx = train_test_split(range(len(labels)), test_size=0.2, stratify=labels, random_state=0)
    x = torch.tensor(images, dtype=torch.float32).view(-1, 1, 8, 8) / 16.0
    y = torch.tensor(labels, dtype=torch.int64)
    train_idx, test_idx = torch.tensor(train_idx), torch.tensor(test_idx)
    width = 8
    model = nn.Sequential(
        nn.Conv2d(1, width, 3, padding=1, bias=False), nn.BatchNorm2d(width), nn.ReLU(), nn.AvgPool2d(2),
        nn.Conv2d(width, 2 * width, 3, padding=1, bias=False), nn.BatchNorm2d(2 * width), nn.ReLU(), nn.AvgPool2d(2),
        nn.Flatten(), nn.Linear(2 * width * 4, 10),
    )
    opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    batch = train_idx[torch.randperm(len(train_idx))[:128]]
    loss = nn.functional.cross_entropy(model(x[batch]), y[batch])
    opt.zero_grad()
    loss.backward()
    opt.step()
    model.eval()
    with torch.no_grad():
        logits = model(x[test_idx])
        test_loss = nn.functional.cross_entropy(logits, y[test_idx])
        accuracy = (logits.argmax(1) == y[test_idx]).float().mean()
    print(f"train loss {loss.item():.3f}, test loss {test_loss.item():.3f}, test accuracy {accuracy.item():.3f}")


if __name__ == "__main__":
    main()

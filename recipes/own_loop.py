"""A plain digits training script, converted to filial. Every changed line is marked ``# filial``.

The script trains the mail-room MLP on digits whose training labels are partly wrong. Without the
marked lines it is an ordinary PyTorch loop that trains one model; with them, the same loop runs
once per generation, each student learning from the previous generation's cached predictions,
and the held-out envelopes decide when to stop.

    python recipes/own_loop.py --epochs 60 --run-dir runs/own_loop
"""

from __future__ import annotations

import argparse

import torch

import filial  # filial
from filial.demo import MLP, mail_room


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--epochs", type=int, default=60)
    parser.add_argument("--generations", type=int, default=4)
    parser.add_argument("--run-dir", default="runs/own_loop")
    args = parser.parse_args()

    torch.manual_seed(0)
    room = mail_room(noise=0.3, seed=0)
    train_loader, heldout_loader, test_loader = room.loaders(batch_size=64, seed=0)
    make_model = MLP(hidden=(256, 256))
    device = torch.device("cuda" if torch.cuda.is_available() else "cpu")

    lineage = filial.Lineage(  # filial
        make_model,
        train_loader,
        heldout_loader,
        run_dir=args.run_dir,  # filial
        targets="ce",
        max_generations=args.generations,
        test_loader=test_loader,  # filial
    )  # filial
    for gen in lineage:  # filial
        model = gen.model.to(device)  # filial: was model = make_model().to(device)
        optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9, weight_decay=5e-4)
        for _epoch in range(args.epochs):
            model.train()
            for inputs, labels, targets in gen.loader:  # filial: was train_loader, (inputs, labels)
                inputs, labels = inputs.to(device), labels.to(device)
                loss = gen.loss(model(inputs), labels, targets)  # filial: was cross_entropy
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
        gen.finish(model)  # filial

    result = lineage.result  # filial
    model = result.best_model().to(device)  # filial: was the one trained model
    model.eval()
    correct = 0
    with torch.no_grad():
        for inputs, labels in test_loader:
            correct += (model(inputs.to(device)).argmax(1) == labels.to(device)).sum().item()
    accuracy = correct / len(test_loader.dataset)
    gains = [f"{r['generation']}: {r['heldout']:.3f}" for r in result.records]  # filial
    print(f"held-out by generation  {', '.join(gains)}")  # filial
    print(f"best generation {result.best}, stopped: {result.stop_reason}")  # filial
    print(f"test accuracy of the kept model: {accuracy:.4f}")


if __name__ == "__main__":
    main()

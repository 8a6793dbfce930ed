"""One training step of saccade's networks in PyTorch (CPU), as an independent reference for
the speed of `saccade bench --train-step`: the same layers, the same shapes, the same
estimate of Psi (top cells summed exactly plus draws from the rest), the same loss, forward
and backward, and an AdamW step.

Usage: python tests/bench/train_step.py [--frames 8] [--top 24] [--tail 8] [--size 2448x2048]
       [--threads 2] [--repeats 10]
Needs torch (PyPI, CPU): pip install -r tests/bench/requirements-torch.txt
Prints one JSON object: median and min ms per step, and per frame.
"""
import argparse
import json
import statistics
import time

import torch
import torch.nn as nn
import torch.nn.functional as F

# Constants as in src/train/model.rs: the offset inside the log of the pooled features,
# the evidence sharpness and clamp, and the head's offset inside ln(Psi + eps).
FEATURE_EPS = 1e-3
SHARPNESS = 4.0
LIMIT = 40.0
HEAD_EPS = 1e-12


class Attention(nn.Module):
    def __init__(self):
        super().__init__()
        self.c1 = nn.Conv2d(3, 8, 4, stride=2)
        self.c2 = nn.Conv2d(8, 8, 3, padding=1)
        self.c3 = nn.Conv2d(8, 16, 3, padding=1)
        self.out = nn.Conv2d(16, 1, 1)

    def forward(self, x):
        h = F.relu(self.c1(F.pad(x, (1, 1, 1, 1), mode="replicate")))
        h = F.max_pool2d(F.relu(self.c2(h)), 2)
        return self.out(F.relu(self.c3(h))).flatten(1)


class Features(nn.Module):
    def __init__(self, classes=4):
        super().__init__()
        self.c1 = nn.Conv2d(3, 16, 3, stride=2, padding=1)
        self.c2 = nn.Conv2d(16, 16, 3, padding=1)
        self.c3 = nn.Conv2d(16, 32, 3, padding=1)
        self.c4 = nn.Conv2d(32, 32, 3, padding=1)
        self.d1 = nn.Linear(32, 32)
        self.d2 = nn.Linear(32, classes)

    def forward(self, x):
        h = F.relu(self.c1(x))
        h = F.max_pool2d(F.relu(self.c2(h)), 2)
        h = F.max_pool2d(F.relu(self.c3(h)), 2)
        h = F.relu(self.c4(h)).amax(dim=(2, 3))
        score = self.d2(F.relu(self.d1(torch.log(h + FEATURE_EPS))))
        return torch.exp(torch.clamp(SHARPNESS * score, -LIMIT, LIMIT))


class Head(nn.Module):
    def __init__(self, classes=4):
        super().__init__()
        self.d = nn.Linear(classes, classes)

    def forward(self, psi):
        return self.d(torch.log(F.relu(psi) + HEAD_EPS))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=8)
    ap.add_argument("--top", type=int, default=24)
    ap.add_argument("--tail", type=int, default=8)
    ap.add_argument("--size", default="2448x2048")
    ap.add_argument("--patch", type=int, default=48)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=10)
    a = ap.parse_args()
    torch.set_num_threads(a.threads)
    torch.manual_seed(0)
    w, h = (int(v) for v in a.size.split("x"))
    # Thumbnail cut to whole cells (factor 8, cell stride 4), as the trainer keeps it.
    th, tw = (h // 8) // 4 * 4, (w // 8) // 4 * 4
    rows, cols = th // 4, tw // 4
    att, feat, head = Attention(), Features(), Head()
    params = list(att.parameters()) + list(feat.parameters()) + list(head.parameters())
    opt = torch.optim.AdamW(params, lr=1e-3, weight_decay=1e-4)
    thumbs = torch.randn(a.frames, 3, th, tw)
    k = a.top + a.tail
    # Patches cut beforehand (the cut itself is memory traffic, not network work).
    patches = torch.randn(a.frames, k, 3, a.patch, a.patch)
    target = (torch.rand(a.frames, 4) < 0.3).float()

    def step():
        opt.zero_grad()
        scores = att(thumbs)
        att_p = torch.softmax(scores, dim=1)
        top = att_p.topk(a.top, dim=1)
        rest = att_p.detach().scatter(1, top.indices, 0.0)
        mass = rest.sum(1, keepdim=True)
        draws = torch.multinomial(rest / mass, a.tail, replacement=True)
        a_tail = att_p.gather(1, draws)
        weights = torch.cat([top.values, mass / a.tail * a_tail / a_tail.detach()], dim=1)
        f = feat(patches.view(-1, 3, a.patch, a.patch)).view(a.frames, k, -1)
        psi = (weights.unsqueeze(2) * f).sum(1)
        loss = F.binary_cross_entropy_with_logits(head(psi), target)
        loss.backward()
        opt.step()
        return rows * cols

    step()
    times = []
    for _ in range(a.repeats):
        t = time.perf_counter()
        step()
        times.append((time.perf_counter() - t) * 1000)
    med = statistics.median(times)
    print(json.dumps({
        "implementation": f"pytorch {torch.__version__}",
        "threads": a.threads,
        "frames": a.frames,
        "patches_per_frame": k,
        "thumbnail": [th, tw],
        "median_ms_per_step": med,
        "min_ms_per_step": min(times),
        "median_ms_per_frame": med / a.frames,
    }))


if __name__ == "__main__":
    main()

"""The fit stage's network and training step in PyTorch (CPU), for the
throughput comparison in bench/train_bench.sh. Same shapes, layers and loss
as src/model/net.rs with the default Config (stem 2, widths 64-64-64,
hidden 128, latent 8, 5 heads, global max of every level appended to the
flat features, reconstruction at half resolution,
closed-form shared variance, unbiased MMD^2 with the median heuristic),
same batch (64 pairs, half labelled), AdamW.

Usage: python3 bench/train_torch.py [--threads N] [--steps N]; prints one JSON line.
"""

import argparse
import json
import math
import time

import torch
from torch import nn

H = W = 64
STEM, WIDTHS, HIDDEN, LATENT, HEADS, HEAD_HIDDEN, A, R = 2, [64, 64, 64], 128, 8, 5, 64, 3, 1
LN_2PI = math.log(2 * math.pi)


def s2d(x):
    b, h, w, c = x.shape
    return x.reshape(b, h // 2, 2, w // 2, 2 * c).transpose(2, 3).reshape(b, h // 2, w // 2, 4 * c)


def d2s(x):
    b, h, w, c4 = x.shape
    c = c4 // 4
    return x.reshape(b, h, w, 2, 2 * c).transpose(2, 3).reshape(b, 2 * h, 2 * w, c)


def pool(x):
    b, h, w, c = x.shape
    return x.reshape(b, h // 2, 2, w // 2, 2, c).mean(dim=(2, 4))


class Pyramid(nn.Module):
    def __init__(self, cin):
        super().__init__()
        c = cin << (2 * STEM)
        self.levels = nn.ModuleList()
        for w in WIDTHS:
            self.levels.append(nn.Linear(c, w))
            c = 4 * w
        side = H >> (STEM + len(WIDTHS) - 1)
        self.fc = nn.Linear(side * side * WIDTHS[-1] + sum(WIDTHS), HIDDEN)

    def forward(self, x):
        for _ in range(STEM):
            x = s2d(x)
        feats = []
        for j, layer in enumerate(self.levels):
            if j > 0:
                x = s2d(x)
            x = torch.relu(layer(x))
            feats.append(x)
        b = x.shape[0]
        pooled = [f.reshape(b, -1, f.shape[-1]).amax(dim=1) for f in feats]
        flat = torch.cat([x.reshape(b, -1)] + pooled, dim=1)
        return feats, torch.relu(self.fc(flat))


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.encoder = Pyramid(3)
        self.posterior = Pyramid(9)
        self.mu = nn.Linear(HIDDEN, LATENT)
        self.logvar = nn.Linear(HIDDEN, LATENT)
        side = H >> (STEM + len(WIDTHS) - 1)
        self.side = side
        self.top = nn.Linear(HIDDEN + LATENT, side * side * WIDTHS[-1])
        L = len(WIDTHS)
        self.merge = nn.ModuleList([nn.Linear(2 * WIDTHS[j - 1], WIDTHS[j - 1]) for j in range(L, 0, -1)])
        self.fromz = nn.ModuleList([nn.Linear(LATENT, WIDTHS[j - 1]) for j in range(L, 0, -1)])
        self.up = nn.ModuleList([nn.Linear(WIDTHS[j - 1], 4 * WIDTHS[j - 2]) for j in range(L, 1, -1)])
        self.out = nn.Linear(WIDTHS[0], 3 * (4 ** (STEM - R)))
        nn.init.zeros_(self.out.weight)
        nn.init.zeros_(self.out.bias)
        self.heads = nn.ModuleList(
            [nn.Sequential(nn.Linear(LATENT, HEAD_HIDDEN), nn.ReLU(), nn.Linear(HEAD_HIDDEN, 2 * A)) for _ in range(HEADS)]
        )

    def loss(self, x_t, x_t1, n_l, actions, boot, eps):
        _, g = self.posterior(torch.cat([x_t, x_t1, x_t1 - x_t], dim=3))
        mu, lv = self.mu(g), self.logvar(g).clamp(-16, 8)
        z = mu + torch.exp(0.5 * lv) * eps
        feats, h = self.encoder(x_t)
        b = x_t.shape[0]
        u = torch.relu(self.top(torch.cat([h, z], 1))).reshape(b, self.side, self.side, WIDTHS[-1])
        L = len(WIDTHS)
        for step, j in enumerate(range(L, 0, -1)):
            zb = self.fromz[step](z)[:, None, None, :]
            u = torch.relu(self.merge[step](torch.cat([u, feats[j - 1]], 3)) + zb)
            if j > 1:
                u = d2s(self.up[step](u))
        delta = self.out(u)
        for _ in range(R, STEM):
            delta = d2s(delta)
        base, target = x_t, x_t1
        for _ in range(R):
            base, target = pool(base), pool(target)
        pred = base + delta
        d = pred[0].numel()
        sse = ((pred - target) ** 2).reshape(b, -1).sum(1)
        s2 = (sse.sum() / (b * d)).clamp(min=1e-6)
        recon = (0.5 * d * (LN_2PI + torch.log(s2)) + 0.5 * sse / s2).mean()
        kl = (0.5 * (mu ** 2 + lv.exp() - 1 - lv).sum(1)).mean()
        act = 0.0
        for m, head in enumerate(self.heads):
            # Faithful head loss (actuary's default `head-loss`): the mean by squared
            # error, the log-variance by the NLL on the detached posterior mean and
            # the detached head mean (a second head pass, as in candle).
            o = head(mu[:n_l])
            mean = o[:, :A]
            hlv = head(mu[:n_l].detach())[:, A:].clamp(-12, 8)
            nll = (0.5 * (actions - mean) ** 2
                   + 0.5 * (LN_2PI + hlv + (actions - mean.detach()) ** 2 * torch.exp(-hlv))).sum(1)
            act = act + (nll * boot[m]).sum() / n_l
        act = act / HEADS
        x, y = mu[:n_l], mu[n_l:]
        zz = torch.cat([x, y]).detach()
        dd = ((zz[:, None] - zz[None]) ** 2).sum(-1)
        iu = torch.triu_indices(len(zz), len(zz), 1)
        sigma = dd[iu[0], iu[1]].sqrt().sort().values[(iu.shape[1] - 1) // 2]
        k = lambda p, q: torch.exp(-((p[:, None] - q[None]) ** 2).sum(-1) / (2 * sigma ** 2))
        m_, n_ = len(x), len(y)
        mmd = (k(x, x).sum() - m_) / (m_ * (m_ - 1)) + (k(y, y).sum() - n_) / (n_ * (n_ - 1)) - 2 * k(x, y).mean()
        return recon + kl + 100.0 * act + 100.0 * mmd


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--steps", type=int, default=30)
    p.add_argument("--batch", type=int, default=64)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    torch.manual_seed(0)
    b, n_l = a.batch, a.batch // 2
    net = Net()
    opt = torch.optim.AdamW(net.parameters(), lr=1e-3, weight_decay=0.0)
    params = sum(p.numel() for p in net.parameters())
    ramp = (torch.arange(H * W * 3, dtype=torch.float32) * 0.01).reshape(1, H, W, 3)

    def batch():
        x0 = ((ramp + 20 * torch.rand(b, H, W, 3)).floor() % 256) / 127.5 - 1
        x1 = ((ramp + 1 + 20 * torch.rand(b, H, W, 3)).floor() % 256) / 127.5 - 1
        return x0, x1, torch.randn(n_l, A), torch.randint(0, 3, (HEADS, n_l)).float(), torch.randn(b, LATENT)

    batches = [batch() for _ in range(4)]
    for bt in batches[:2]:
        opt.zero_grad()
        net.loss(bt[0], bt[1], n_l, *bt[2:]).backward()
        opt.step()
    t0 = time.perf_counter()
    for s in range(a.steps):
        bt = batches[s % 4]
        opt.zero_grad()
        net.loss(bt[0], bt[1], n_l, *bt[2:]).backward()
        opt.step()
    secs = time.perf_counter() - t0
    print(json.dumps({"impl": "torch", "version": torch.__version__, "threads": a.threads, "batch": b,
                      "steps": a.steps, "params": params, "pairs_per_s": round(a.steps * b / secs, 1)}))


if __name__ == "__main__":
    main()

"""Pictures of a run: an animated GIF with short trails, and a PNG of trajectories and density."""
import os
import tempfile

import numpy as np


class Trace:
    """Positions per sampled frame (ids + xy), kept small by sampling every `every` frames."""

    def __init__(self, every=1, max_frames=400):
        self.every, self.max_frames = max(1, int(every)), int(max_frames)
        self.frames, self.ids, self.pos = [], [], []

    def capture(self, world):
        if world.frame % self.every == 0 and len(self.frames) < self.max_frames:
            self.frames.append(world.frame)
            self.ids.append(world.ids.copy())
            self.pos.append(world.positions.copy())

    def tracks(self):
        """id -> float64[k, 2] positions over the sampled frames (agents present in >= 2 samples)."""
        if not self.ids:
            return {}
        all_ids = np.concatenate(self.ids)
        all_pos = np.concatenate(self.pos)
        order = np.argsort(all_ids, kind="stable")
        ids_sorted = all_ids[order]
        cuts = np.flatnonzero(np.diff(ids_sorted)) + 1
        return {int(g[0]): all_pos[order][s:e] for g, s, e in
                zip(np.split(ids_sorted, cuts), np.r_[0, cuts], np.r_[cuts, len(ids_sorted)]) if e - s >= 2}


def _atomic_save(path, save):
    d = os.path.dirname(os.path.abspath(path))
    os.makedirs(d, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=d, suffix=os.path.splitext(path)[1])
    os.close(fd)
    try:
        save(tmp)
        os.replace(tmp, path)
    except BaseException:
        os.unlink(tmp)
        raise


def _scene_extent(world, trace):
    xmin, ymin, xmax, ymax = world.scene.bounds(np.concatenate(trace.pos) if trace.pos else None, margin=0.5)
    return xmin, ymin, xmax, ymax


def write_gif(world, trace, path, size=480, trail=8, fps=15):
    """Animated GIF: walls in grey, targets in green, agents as dots with short trails."""
    from PIL import Image, ImageDraw

    xmin, ymin, xmax, ymax = _scene_extent(world, trace)
    scale = size / max(xmax - xmin, ymax - ymin)
    w, h = int((xmax - xmin) * scale) + 1, int((ymax - ymin) * scale) + 1

    def px(xy):
        return [((x - xmin) * scale, h - 1 - (y - ymin) * scale) for x, y in xy]

    base = Image.new("RGB", (w, h), (255, 255, 255))
    d = ImageDraw.Draw(base)
    for t in world.scene.targets:
        x0, y0, x1, y1 = t.bounds()
        (a, b), (c, e) = px([(x0, y1), (x1, y0)])
        (d.ellipse if t.kind == "circle" else d.rectangle)([a, b, c, e], fill=(200, 235, 200))
    for poly in world.scene.obstacles:
        d.polygon(px(poly), fill=(150, 150, 150))
    for pts, closed in world.scene.walls:
        line = px(pts) + (px(pts[:1]) if closed else [])
        d.line(line, fill=(60, 60, 60), width=2)

    frames = []
    history = {}
    for ids, pos in zip(trace.ids, trace.pos):
        img = base.copy()
        dr = ImageDraw.Draw(img)
        seen = set()
        for i, p in zip(ids.tolist(), pos):
            hist = history.setdefault(i, [])
            hist.append(tuple(p))
            del hist[:-trail]
            seen.add(i)
            if len(hist) > 1:
                dr.line(px(hist), fill=(150, 170, 230), width=1)
        for i in list(history):
            if i not in seen:
                del history[i]
        rad = max(2.0, 0.25 * scale)
        for x, y in px(pos):
            dr.ellipse([x - rad, y - rad, x + rad, y + rad], fill=(30, 70, 190))
        frames.append(img.convert("P", palette=Image.ADAPTIVE, colors=32))
    if not frames:
        frames = [base.convert("P")]
    _atomic_save(path, lambda p: frames[0].save(p, format="GIF", save_all=True, append_images=frames[1:],
                                                duration=int(1000 / fps), loop=0))


def write_summary_png(world, trace, path, cell=1.0):
    """PNG: trajectories over the scene (left) and time-averaged density in agents/m^2 (right)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    xmin, ymin, xmax, ymax = _scene_extent(world, trace)
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(12, 5.5), constrained_layout=True)
    for ax in (ax1, ax2):
        for pts, closed in world.scene.walls:
            p = np.vstack([pts, pts[:1]]) if closed else pts
            ax.plot(p[:, 0], p[:, 1], color="0.2", lw=2)
        for poly in world.scene.obstacles:
            ax.fill(poly[:, 0], poly[:, 1], color="0.6")
        ax.set_aspect("equal")
        ax.set_xlim(xmin, xmax)
        ax.set_ylim(ymin, ymax)
        ax.set_xlabel("x [m]")
        ax.set_ylabel("y [m]")
    for t in world.scene.targets:
        x0, y0, x1, y1 = t.bounds()
        ax1.add_patch(matplotlib.patches.Rectangle((x0, y0), x1 - x0, y1 - y0, color="tab:green", alpha=0.25))
    for track in trace.tracks().values():
        ax1.plot(track[:, 0], track[:, 1], lw=0.6, alpha=0.7)
    ax1.set_title(f"trajectories ({len(trace.frames)} sampled frames)")
    nxb = max(1, int((xmax - xmin) / cell))
    nyb = max(1, int((ymax - ymin) / cell))
    if trace.pos:
        allp = np.concatenate(trace.pos)
        hist, xe, ye = np.histogram2d(allp[:, 0], allp[:, 1], bins=[nxb, nyb], range=[[xmin, xmax], [ymin, ymax]])
        area = (xe[1] - xe[0]) * (ye[1] - ye[0])
        dens = hist.T / (len(trace.pos) * area)
        im = ax2.imshow(dens, origin="lower", extent=(xmin, xmax, ymin, ymax), cmap="viridis", interpolation="nearest")
        fig.colorbar(im, ax=ax2, label="mean density [agents/m$^2$]", shrink=0.8)
    ax2.set_title(f"density, {cell:g} m cells")
    _atomic_save(path, lambda p: fig.savefig(p, dpi=110, format="png"))
    plt.close(fig)

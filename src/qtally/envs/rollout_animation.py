"""A greedy rollout as an animated GIF, for environments that render ``rgb_array`` frames.

Drawn with Pillow (already present through matplotlib). Environments that cannot
render (no ``rgb_array`` mode, or a missing optional renderer such as pygame for
Gymnasium's toy-text games) yield ``None`` and a reason instead of an animation.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .factory import EnvironmentSpec, make_environment

__all__ = ["rollout_animation"]


def rollout_animation(spec: EnvironmentSpec, actions: np.ndarray, path: Path, seed: int, max_frames: int = 300) -> tuple[Path | None, str]:
    """Play the deterministic policy ``actions[state]`` once from a seeded reset and save the frames."""
    from PIL import Image

    try:
        environment = make_environment(spec, render_mode="rgb_array")
    except Exception as exc:  # the environment has no rgb_array mode
        return None, f"cannot render: {str(exc).splitlines()[0][:160] if str(exc) else type(exc).__name__}"
    env, encode = environment.env, environment.encoder.encode
    try:
        observation, _ = env.reset(seed=int(seed))
        frames = [env.render()]
        for _ in range(max_frames - 1):
            observation, _, terminated, truncated, _ = env.step(int(actions[encode(observation)]))
            frames.append(env.render())
            if terminated or truncated:
                break
    except Exception as exc:  # a renderer that needs an optional dependency
        return None, f"cannot render: {str(exc).splitlines()[0][:160] if str(exc) else type(exc).__name__}"
    finally:
        environment.close()
    if not frames or not isinstance(frames[0], np.ndarray):
        return None, "the environment returned no rgb_array frames"
    fps = float(env.metadata.get("render_fps") or 4)
    images = [Image.fromarray(np.asarray(frame, dtype=np.uint8)) for frame in frames]
    images[0].save(path, save_all=True, append_images=images[1:], duration=int(1000 / fps), loop=0)
    return path, f"{len(images)} frames"

"""A small rendered world of rural roads seen from a level pinhole camera, for demo and tests.

It draws the seed scenes: cars, vans, buses, farm tractors and road-works trailers at real sizes on a
perspective-correct road, with the true camera stored so tests can check the fitted ground model.
"""

from .camera import Camera
from .layout import sample_scene
from .render import RenderedScene, render_scene
from .scene import CATEGORIES, RARE, Lighting, Road, SceneObject, SceneryItem, SceneSpec
from .seed_set import DEFAULT_SEED, RENDERER_VERSION, render_seed_set

__all__ = [
    "CATEGORIES",
    "DEFAULT_SEED",
    "RARE",
    "RENDERER_VERSION",
    "Camera",
    "Lighting",
    "RenderedScene",
    "Road",
    "SceneObject",
    "SceneSpec",
    "SceneryItem",
    "render_scene",
    "render_seed_set",
    "sample_scene",
]

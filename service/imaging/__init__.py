"""Imaging: reading specimen photographs, segmenting them, and rendering known masks as photos.

``load_image`` decides the format from the content and refuses decompression bombs before
decoding; ``segment`` turns a photograph into a specimen mask with the settings it used;
``render_photo`` draws a known mask as a photograph for tests and demonstrations
(``render_specimen`` also returns the mask drawn).
"""

from service.imaging.load import ACCEPTED_FORMATS, LoadedImage, load_image, sniff_format
from service.imaging.render import RenderedPhoto, render_photo, render_specimen
from service.imaging.segmentation import MODES, POLARITIES, Segmentation, segment

__all__ = ["ACCEPTED_FORMATS", "MODES", "POLARITIES", "LoadedImage", "RenderedPhoto", "Segmentation", "load_image",
           "render_photo", "render_specimen", "segment", "sniff_format"]

"""Imaging: reading specimen photographs, segmenting them, and rendering known masks as photos.

``load_image`` decides the format from the content and refuses decompression bombs before
decoding; ``segment`` turns a photograph into a specimen mask with the settings it used;
``render_photo`` draws a known mask as a photograph for tests and demonstrations.
"""

from service.imaging.load import ACCEPTED_FORMATS, LoadedImage, load_image, sniff_format

__all__ = ["ACCEPTED_FORMATS", "LoadedImage", "load_image", "sniff_format"]

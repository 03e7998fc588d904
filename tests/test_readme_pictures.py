"""README's pictures exist and are real images (a broken link is what a reader would notice)."""

import os
import re

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def test_readme_images_exist_and_are_png():
    text = open(os.path.join(ROOT, "README.md")).read()
    paths = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert paths, "README shows no picture of the demo"
    for rel in paths:
        with open(os.path.join(ROOT, rel), "rb") as fh:
            assert fh.read(8) == b"\x89PNG\r\n\x1a\n", rel  # PNG signature (PNG specification, ISO/IEC 15948)

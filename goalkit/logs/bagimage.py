"""Camera images from bag messages (sensor_msgs/Image raw, sensor_msgs/CompressedImage) as
uint8 frames, resized with Pillow when the layout gives a frame size."""

from __future__ import annotations

import io

import numpy as np

from goalkit.errors import LogError

#: Raw encodings read (names from sensor_msgs/image_encodings.h) and their channels.
ENCODINGS = {"mono8": 1, "rgb8": 3, "bgr8": 3, "rgba8": 4, "bgra8": 4}


def decode_image(msg, size=None, *, file, key, episode, when) -> np.ndarray:
    """One image message as a ``(H, W)`` or ``(H, W, C)`` uint8 array (RGB order).

    Parameters
    ----------
    msg : rosbags message
        A ``sensor_msgs/msg/Image`` or ``sensor_msgs/msg/CompressedImage``.
    size : (int, int), optional
        Height and width to resize to (bilinear, Pillow).
    file, key, episode, when
        Where the image is, for messages.

    Raises
    ------
    LogError
        On an encoding that is not read, a data size that disagrees with the header, or
        compressed data that Pillow cannot open.
    """
    if hasattr(msg, "encoding"):              # raw Image
        enc = str(msg.encoding)
        if enc not in ENCODINGS:
            raise LogError(f"image encoding '{enc}' at {when} is not read; expected one of "
                           f"{', '.join(ENCODINGS)}", file=file, key=key, episode=episode)
        c, h, w, step = ENCODINGS[enc], int(msg.height), int(msg.width), int(msg.step)
        data = np.asarray(msg.data, dtype=np.uint8)
        if step < w * c or data.size < h * step:
            raise LogError(f"image at {when} has {data.size} bytes (step {step}); expected "
                           f"{h} rows of {w * c}", file=file, key=key, episode=episode)
        img = data[:h * step].reshape(h, step)[:, :w * c].reshape(h, w, c)
        if enc.startswith("bgr"):
            img = img[:, :, [2, 1, 0] + ([3] if c == 4 else [])]
        if c == 1:
            img = img[:, :, 0]
    else:                                     # CompressedImage
        try:
            from PIL import Image
            with Image.open(io.BytesIO(bytes(np.asarray(msg.data, dtype=np.uint8)))) as pic:
                img = np.asarray(pic.convert("L" if pic.mode in ("L", "1", "I;16") else "RGB"))
        except ImportError:  # pragma: no cover - the extra installs Pillow
            raise LogError("compressed images need Pillow: pip install 'goalkit[bags]'", file=file,
                           key=key, episode=episode) from None
        except Exception as exc:
            raise LogError(f"cannot decode the compressed image at {when} (format "
                           f"'{msg.format}': {exc})", file=file, key=key, episode=episode) from None
    if size is not None and img.shape[:2] != tuple(size):
        from PIL import Image
        img = np.asarray(Image.fromarray(np.ascontiguousarray(img)).resize((size[1], size[0]),
                                                                          Image.BILINEAR))
    return np.ascontiguousarray(img, dtype=np.uint8)

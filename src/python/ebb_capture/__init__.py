"""Record one PyTorch training step as an Ebb trace.

    import ebb_capture
    with ebb_capture.record("step.tape", model=model, title="epoch 3, batch 41") as rec:
        loss = loss_fn(model(x), y)
        rec.output(loss)
        loss.backward()

writes ``step.tape`` (JSON) and ``step.safetensors`` beside it; open them
with ``ebb check step.tape``, ``ebb verify step.tape`` or ``ebb open``.
"""

from .errors import CaptureError
from .recording import Recording, record

__version__ = "0.1.0"
__all__ = ["CaptureError", "Recording", "record", "__version__"]

"""The bundled language model and its runner (onnxruntime, tokenizers and numpy only).

``service.model.build`` makes the bundled model and is the only module that uses PyTorch; it is
never imported by the service.
"""

from service.model.runner import (
    BUNDLED,
    Continuation,
    Model,
    ModelError,
    ModelInfo,
    Perplexity,
    PromptError,
    PromptTooLong,
    Step,
    StepFn,
    held_out_perplexity,
    load,
)

__all__ = [
    "BUNDLED",
    "Continuation",
    "Model",
    "ModelError",
    "ModelInfo",
    "Perplexity",
    "PromptError",
    "PromptTooLong",
    "Step",
    "StepFn",
    "held_out_perplexity",
    "load",
]

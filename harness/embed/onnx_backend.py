"""A faster encode path: the model's own weights exported to ONNX locally, optionally quantised to int8.

The exported graph returns every hidden state stacked, so the same pooling and layer
code runs on its output. Exports are kept under the cache folder by weights digest.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path
from types import SimpleNamespace

OPSET = 17
EXPORT_LIBRARIES = ("onnx", "onnxruntime", "torch")  # what the exported graph and its run depend on


def export_settings() -> dict:
    """What an exported graph depends on besides the model: the opset and the versions of the exporting and running
    libraries (part of the encode key of an ONNX backend, and of the export folder's name)."""
    from importlib import metadata

    versions = {}
    for name in EXPORT_LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "absent"
    return {"opset": OPSET, **versions}


def _wrapper(transformer, with_token_types: bool):
    import torch

    class HiddenStates(torch.nn.Module):
        """Calls the transformer with keyword arguments (positional calls clash with use_cache) and stacks its hidden states."""

        def __init__(self):
            super().__init__()
            self.transformer = transformer

        def forward(self, input_ids, attention_mask, token_type_ids=None):
            extra = {"token_type_ids": token_type_ids} if with_token_types else {}
            output = self.transformer(input_ids=input_ids, attention_mask=attention_mask, output_hidden_states=True, **extra)
            return torch.stack(output.hidden_states)

    return HiddenStates().eval()


def exported_model(encoder, folder: Path, int8: bool) -> Path:
    """Export (once) the encoder's transformer to ONNX under ``folder``; with ``int8``, quantise its weights dynamically."""
    import torch

    folder.mkdir(parents=True, exist_ok=True)
    fp32 = folder / "model_fp32.onnx"
    with_token_types = "token_type_ids" in encoder.tokenizer.model_input_names
    if not fp32.is_file():
        sample = encoder.tokenizer(["a short sample text", "another"], padding=True, return_tensors="pt")
        names = ["input_ids", "attention_mask"] + (["token_type_ids"] if with_token_types else [])
        temporary = folder / f".fp32.{os.getpid()}.{secrets.token_hex(4)}.onnx"
        axes = {name: {0: "batch", 1: "tokens"} for name in names}
        axes["hidden_states"] = {1: "batch", 2: "tokens"}
        with torch.inference_mode():
            torch.onnx.export(_wrapper(encoder.transformer, with_token_types), tuple(sample[n] for n in names),
                              str(temporary), input_names=names, output_names=["hidden_states"], dynamic_axes=axes,
                              opset_version=OPSET, dynamo=False)
        os.replace(temporary, fp32)
    if not int8:
        return fp32
    quantised = folder / "model_int8.onnx"
    if not quantised.is_file():
        from onnxruntime.quantization import QuantType, quantize_dynamic

        temporary = folder / f".int8.{os.getpid()}.{secrets.token_hex(4)}.onnx"
        quantize_dynamic(str(fp32), str(temporary), weight_type=QuantType.QInt8)
        os.replace(temporary, quantised)
    return quantised


class OnnxTransformer:
    """Runs an exported graph with ONNX Runtime, answering like a Hugging Face model: ``.hidden_states``."""

    def __init__(self, path: Path, threads: int):
        import onnxruntime

        options = onnxruntime.SessionOptions()
        options.intra_op_num_threads = threads
        self.session = onnxruntime.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
        self.inputs = {i.name for i in self.session.get_inputs()}

    def __call__(self, output_hidden_states: bool = True, **inputs):
        import torch

        feed = {name: tensor.numpy() for name, tensor in inputs.items() if name in self.inputs}
        (stacked,) = self.session.run(["hidden_states"], feed)
        return SimpleNamespace(hidden_states=tuple(torch.from_numpy(layer) for layer in stacked))


def onnx_encoder(encoder, folder: Path, int8: bool):
    """The same encoder with its transformer replaced by the ONNX (or int8 ONNX) graph."""
    import torch

    from harness.embed.models import LoadedEncoder

    return LoadedEncoder(tokenizer=encoder.tokenizer, max_length=encoder.max_length,
                         transformer=OnnxTransformer(exported_model(encoder, folder, int8), torch.get_num_threads()))

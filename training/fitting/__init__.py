"""Fitting a model: patch datasets, labelled candidate readings, the training run and ONNX export.

Names load their module on first use (scikit-learn and the ONNX exporter are imported only when needed).
"""

from detector._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "PatchSet": "dataset",
    "build_patch_set": "dataset",
    "CandidateSet": "objects",
    "candidate_set": "objects",
    "label_readings": "objects",
    "TrainConfig": "train",
    "format_card_summary": "train",
    "split_images": "train",
    "train_model": "train",
    "onnx_parity": "export",
    "to_onnx_bytes": "export",
})

__all__ = [
    "CandidateSet",
    "PatchSet",
    "TrainConfig",
    "build_patch_set",
    "candidate_set",
    "format_card_summary",
    "label_readings",
    "onnx_parity",
    "split_images",
    "to_onnx_bytes",
    "train_model",
]

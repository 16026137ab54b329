"""Export fitted scikit-learn classifiers and regressors to ONNX and check parity with onnxruntime."""

import numpy as np

from detector.errors import ModelError

__all__ = ["to_onnx_bytes", "onnx_parity", "regressor_to_onnx_bytes", "onnx_regression_parity"]


def _to_onnx(estimator, n_features, options=None):
    from skl2onnx import to_onnx
    from skl2onnx.common.data_types import FloatTensorType

    try:
        onx = to_onnx(
            estimator,
            initial_types=[("X", FloatTensorType([None, int(n_features)]))],
            options=options,
            target_opset={"": 17, "ai.onnx.ml": 3},
        )
    except Exception as err:  # converter failures are environment problems the user must see
        raise ModelError(
            f"ONNX export of {type(estimator).__name__} failed: {err} (skl2onnx 1.20 needs protobuf < 5)."
        ) from err
    return onx.SerializeToString()


def _run(model_bytes, X):
    import onnxruntime as ort

    session = ort.InferenceSession(model_bytes, providers=["CPUExecutionProvider"])
    return session.run(None, {session.get_inputs()[0].name: np.ascontiguousarray(X, dtype=np.float32)})


def to_onnx_bytes(estimator, n_features):
    """Serialise a fitted classifier (HistGradientBoosting) to ONNX bytes.

    Probabilities come out as a plain float tensor (no ZipMap), the form that
    :mod:`detector.inference.model` reads.

    Parameters
    ----------
    estimator : fitted classifier
    n_features : int

    Returns
    -------
    model_bytes : bytes
    """
    return _to_onnx(estimator, n_features, options={id(estimator): {"zipmap": False}})


def onnx_parity(model_bytes, estimator, X):
    """Largest absolute difference between onnxruntime and scikit-learn probabilities.

    Parameters
    ----------
    model_bytes : bytes
    estimator : fitted classifier
    X : ndarray of shape (n, n_features)

    Returns
    -------
    max_abs_diff : float
    """
    X = np.ascontiguousarray(X, dtype=np.float32)
    return float(np.max(np.abs(_run(model_bytes, X)[1] - estimator.predict_proba(X)))) if len(X) else 0.0


def regressor_to_onnx_bytes(estimator, n_features):
    """Serialise a fitted regressor (HistGradientBoosting) to ONNX bytes with one float output.

    Parameters
    ----------
    estimator : fitted regressor
    n_features : int

    Returns
    -------
    model_bytes : bytes
    """
    return _to_onnx(estimator, n_features)


def onnx_regression_parity(model_bytes, estimator, X):
    """Largest absolute difference between onnxruntime's and scikit-learn's predictions of a regressor.

    Parameters
    ----------
    model_bytes : bytes
    estimator : fitted regressor
    X : ndarray of shape (n, n_features)

    Returns
    -------
    max_abs_diff : float
    """
    X = np.ascontiguousarray(X, dtype=np.float32)
    predicted = np.asarray(_run(model_bytes, X)[0], dtype=np.float64).reshape(-1)
    return float(np.max(np.abs(predicted - estimator.predict(X)))) if len(X) else 0.0

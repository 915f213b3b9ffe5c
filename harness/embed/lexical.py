"""The lexical baseline: TF-IDF followed by truncated SVD (latent semantic analysis), fitted on the corpus."""

from __future__ import annotations

import numpy as np

LEXICAL_POOLING = "tfidf_svd"  # the lexical family has one way to make a document vector


def tfidf_svd(texts: list[str], *, dimensions: int, seed: int, min_df: int = 2) -> np.ndarray:
    """Document vectors from scikit-learn's TfidfVectorizer (English stop words, min_df) and TruncatedSVD."""
    from sklearn.decomposition import TruncatedSVD
    from sklearn.feature_extraction.text import TfidfVectorizer

    matrix = TfidfVectorizer(stop_words="english", min_df=min(min_df, len(texts)), sublinear_tf=True).fit_transform(texts)
    components = min(dimensions, matrix.shape[1] - 1)
    return TruncatedSVD(n_components=components, random_state=seed).fit_transform(matrix).astype(np.float32)

"""Gallery index and text search: ``align index`` and ``align query``.

An index folder holds the gallery's image embeddings from the export's frozen tower:

    INDEX/index.json          the export it belongs to, the image-side fingerprint, how it was built
    INDEX/embeddings.npy      (N, D) float32, every row L2-normalised (memory-mapped when searched)
    INDEX/keys.txt            N lines, row i's key (packed sample key, or path relative to the folder)
    INDEX/gallery.parquet     key, vector, caption and labels as columns; fingerprint and export in
                              its metadata (``--format parquet`` writes it alone, and it is searched)
    INDEX/labels.json, label_codes.npy     the samples' labels, for ``--where FIELD=VALUE``
    INDEX/approximate.faiss   large galleries: the approximate index (faiss IVF, exact re-scoring)

The gallery is embedded with the frozen tower (a packed folder goes through the feature cache, so a
gallery that was already embedded for training or evaluation costs no forward pass), or embeddings
the team already has are adopted after two checks.

    sources.py   images, captions and labels of a packed or plain folder; embedding them
    adopt.py     checking and adopting stored embeddings
    build.py     writing the folder (``build_index``)
    exact.py     exact top-k: numpy, faiss flat
    ann.py       the approximate index: build, tune, measure, save, load, search
    filters.py   label filters
    parquet.py   the Parquet gallery file
    gallery.py   a loaded folder, search over it, the query answer
"""
from .adopt import ADOPT_MIN_COSINE, ADOPT_SAMPLE, adopt_embeddings
from .ann import ApproximateIndex, build_approximate, recall_at_k
from .build import ANN_AUTO_VALUES, FORMATS, build_index
from .exact import FAISS_AUTO_ROWS, faiss_flat_index, top_k_faiss, top_k_numpy
from .filters import LabelTable, parse_where
from .gallery import BACKENDS, GalleryIndex, GallerySearch, load_index, query_answer, query_index
from .sources import folder_images

__all__ = ["ADOPT_MIN_COSINE", "ADOPT_SAMPLE", "ANN_AUTO_VALUES", "BACKENDS", "FAISS_AUTO_ROWS", "FORMATS",
           "ApproximateIndex", "GalleryIndex", "GallerySearch", "LabelTable", "adopt_embeddings",
           "build_approximate", "build_index", "faiss_flat_index", "folder_images", "load_index", "parse_where",
           "query_answer", "query_index", "recall_at_k", "top_k_faiss", "top_k_numpy"]

"""THE owner of a dataset folder: its layout, opening it (one policy for unfinished or mixed
folders), its rows through pyarrow.dataset, the image of a row with the codecs, and the
generator's side (create, resume, --overwrite). Readers import this, never the generator.

    layout     names and paths of the layout (spec.json, dataset.json, manifest/, images/ ...)
    folder     open_dataset(path, allow_incomplete=False) -> DatasetFolder
    rows       read_rows / iter_batches / read_manifest
    images     the image of a row (file, bytes, tar member or re-render) inside a closed box; codecs
    tarstore   --store tar: one deterministic ustar archive per shard; write, read a member
    create     the generator's folder: prepare, check_resumable, part_complete, remove_temporaries
    overwrite  clear(out, spec_path): remove augsplit's own layout and nothing else
"""

from .folder import DatasetFolder, Part, open_dataset
from .images import ImageError, image_of
from .rows import iter_batches, read_manifest, read_rows

__all__ = ["DatasetFolder", "ImageError", "Part", "image_of", "iter_batches", "open_dataset", "read_manifest",
           "read_rows"]

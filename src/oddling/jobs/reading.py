"""How the jobs read images: an input folder checked, a bank's representation loaded, files and folders
embedded through the cache, and what was skipped, in words."""
from __future__ import annotations

from pathlib import Path

from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.numbers import plural


def folder(path, what: str) -> Path:
    """`path` as a Path if it is a folder, else an OddlingError naming it as `what` ("incoming folder")."""
    found = Path(path)
    if not found.is_dir():
        raise OddlingError(f"{what} {found} is not a folder")
    return found


def embed_paths(base: Path, paths: list[Path], representation, options: RunOptions, desc: str):
    """Files -> features with the representation, through the embedding cache where it applies."""
    from oddling.embedding.cache import open_cache
    from oddling.embedding.runner import embed_files

    cache = open_cache(representation, options)
    if options.dask:
        from oddling.embedding.cluster import embed_on_cluster   # only here: plain runs never import distributed

        return embed_on_cluster(options.dask, base, paths, representation, runtime=options.runtime,
                                cache_dir=options.cache_dir, batch_size=options.batch_size, workers=options.workers,
                                progress=options.progress, desc=desc, cache=cache)
    return embed_files(base, paths, representation, batch_size=options.batch_size, workers=options.workers,
                       progress=options.progress, desc=desc, cache=cache)


def skipped_text(records, limit: int = 3) -> str:
    """The files that were not used, counted by status in the runner's and intake's own words (the
    CSV's status column): '2 "skipped: not an image file type (.txt)"; 1 "unreadable: empty file (0 bytes)"'."""
    from collections import Counter

    from oddling.embedding.runner import OK

    counts = Counter(r.status for r in records if r.status != OK).most_common()
    text = "; ".join(f'{n} "{status}"' for status, n in counts[:limit])
    return text + (f"; and {plural(len(counts) - limit, 'other status', 'other statuses')}" if len(counts) > limit
                   else "")


def no_images_message(root, records, left_out: dict | None = None) -> str:
    """"no images found in X (N files skipped: ...)": what a folder without one usable image held."""
    from oddling.embedding.runner import OK

    unused = [r for r in records if r.status != OK]
    parts = [f"{plural(len(unused), 'file')} skipped: {skipped_text(unused)}" if unused else "no files"]
    if left_out:
        parts.append("left out: " + ", ".join(f"{n} {kind}" for kind, n in sorted(left_out.items())))
    return f"no images found in {root} ({'; '.join(parts)})"


def embed_folder(root: Path, representation, options: RunOptions, desc: str, exclude: tuple[Path, ...] = (),
                 allow_empty: bool = False):
    """embed_paths over every file under `root`. A folder without one usable image is an OddlingError
    (no_images_message) unless `allow_empty`: then every file still has its record."""
    from oddling.data.intake import IntakeError, walk

    try:
        found = walk(root, exclude=exclude)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    embedded = embed_paths(root, found.paths, representation, options, desc)
    if not embedded.ok_records and not allow_empty:
        raise OddlingError(no_images_message(root, embedded.records, found.left_out))
    return embedded


def load_bank_representation(bank, options: RunOptions):
    """The representation a bank was made with, loaded and checked against the bank's record."""
    from oddling.backbones.representation import RepresentationSpec, load_representation
    from oddling.bank.store import check_compatible

    spec = RepresentationSpec.from_dict(bank.representation)
    representation = load_representation(spec, options.cache_dir, options.runtime)
    check_compatible(bank, representation.fingerprint())
    return representation

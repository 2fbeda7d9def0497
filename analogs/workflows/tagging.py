"""Workflows: re-classify a store's days (classify, or retag to keep the result) and
record its query defaults.

:func:`classify_store` re-classifies without writing anything: ``analogs tag --rules /
--kmeans / --train`` writes the new tags to ``--out`` only and leaves the store's tags as
they were, unless ``--save`` asks to keep them (:func:`retag_store`). Each write is one
load-modify-write inside :func:`analogs.workflows.store.transaction` (the current
version is loaded after the writer lock is held) and returns the new store, freshly
loaded: a stored object never changes.

>>> from analogs.workflows.tagging import retag_store             # doctest: +SKIP
>>> store = retag_store("store", kmeans=4)                         # doctest: +SKIP
>>> store.tags["kmeans_regime"].value_counts()                     # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from analogs.errors import AnalogsInputError
from analogs.parameters import P
from analogs.workflows import store as store_io

#: Query settings a store can record, with the owner of their checks.
QUERY_DEFAULT_KEYS = ("top", "n_modes", "metric")


def classify_store(store, *, rules=None, kmeans=None, labelled_days=None) -> dict:
    """Re-classify every day of a loaded ``store`` without writing anything.

    ``rules`` (a TOML path or :class:`~analogs.stages.regimes.RegimeRules`) re-applies the
    rule classifier to the diagnostics kept at build, so no archive is needed.
    ``kmeans`` (number of clusters) adds unsupervised regimes of the PCs in a
    ``kmeans_regime`` column; ``labelled_days`` (a table of ``date,regime`` with labels
    of the researcher's choosing, read as text) trains the supervised classifier and
    adds ``learned_regime`` and ``learned_confidence``.

    Returns a dict: ``tags`` (the new tags table, indexed by date), ``models`` (name ->
    Dataset of each learned model) and ``training`` (None, or for ``labelled_days`` the
    learned model's cross-validated accuracy,
    :meth:`~analogs.stages.regimes.SupervisedRegimes.cross_validate`, and
    ``against_rules``, a table of learned labels (rows) against the rule regimes
    (columns) over every archive day).
    """
    from analogs.stages.regimes import RegimeRules
    if kmeans is not None:
        kmeans = P.kmeans.check(kmeans, "retag")
    if rules is not None and not isinstance(rules, RegimeRules):
        rules = RegimeRules.load(rules)
    tags, models, training = _classified(store, rules, kmeans, labelled_days)
    return {"tags": tags, "models": models, "training": training}


def retag_store(path, *, rules=None, kmeans=None, labelled_days=None, progress=False,
                timeout=None):
    """Re-classify every day of the store at ``path`` and keep the result (and any learned
    model) in the store, replacing its tags; return the new store (its ``tags`` hold the
    new columns, its ``last_retag`` the ``training`` figures of :func:`classify_store`).

    See :func:`classify_store` for ``rules``, ``kmeans`` and ``labelled_days`` (and to
    classify without changing the store). Learned models are stored as arrays in
    ``models.nc`` (never pickled). ``timeout``: seconds to wait for another writer.
    """
    from analogs.stages.regimes import RegimeRules
    from analogs.workflows.analog_store import AnalogStore
    if kmeans is not None:
        kmeans = P.kmeans.check(kmeans, "retag")
    if rules is not None and not isinstance(rules, RegimeRules):
        rules = RegimeRules.load(rules)
    with store_io.transaction(path, timeout=timeout) as txn:
        current = AnalogStore._load_version(txn.path, manifest=txn.manifest)
        tags, models, training = _classified(current, rules, kmeans, labelled_days)
        manifest = store_io.editable(current.manifest)
        if rules is not None:
            manifest["regime_rules"] = rules.to_dict()
        if models:
            manifest["regime_models"] = sorted(models)
        txn.carry(*(name for name in current.manifest["files"]
                    if name != store_io.TAGS and not (name == store_io.MODELS and models)))
        table = tags.reset_index()
        table.attrs = dict(current.tag_attrs)
        store_io.write_table(table, txn.staging / store_io.TAGS)
        for mode, (name, dataset) in zip(("w", "a"), sorted(models.items())):
            store_io.write_dataset(dataset, txn.staging / store_io.MODELS, group=name, mode=mode)
        txn.commit(manifest)
        new = AnalogStore._load_version(txn.path, manifest=txn.committed)
    new.last_retag = training
    return new


def read_labels(path):
    """A labelled-days table (``date,regime``) from CSV or Parquet with its labels read
    as text: "null", "NA" or "None" are labels of the researcher's choosing, never
    missing values. A DataFrame is returned as it is."""
    import pandas as pd
    if not isinstance(path, (str, Path)):
        return path
    path = Path(path)
    if not path.is_file():
        raise AnalogsInputError(f"labelled-days file {path} does not exist or is not a file")
    try:
        if path.suffix.lower() == ".parquet":
            return pd.read_parquet(path)
        return pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
            ValueError, OSError) as error:
        first = str(error).splitlines()[0] if str(error) else type(error).__name__
        raise AnalogsInputError(f"labelled-days file {path} could not be read ({first})") from None


def _classified(current, rules, kmeans, labelled_days):
    """The new tags table of ``current``, the learned models (name -> Dataset) and the
    training figures (None without ``labelled_days``)."""
    import pandas as pd
    from analogs.stages.regimes import KMeansRegimes, RuleClassifier, SupervisedRegimes
    if current.tags is None:
        raise AnalogsInputError(f"store {current.path} has no tags; rebuild it with analogs build")
    tags = current.tags.copy()
    if rules is not None:
        diagnostics = tags.copy()
        diagnostics.attrs = dict(current.tag_attrs)
        labels = RuleClassifier(rules).predict(diagnostics)
        tags[["regime", "confidence", "reason"]] = labels[["regime", "confidence", "reason"]].to_numpy()
    models = {}
    if kmeans is not None:
        model = KMeansRegimes(n_regimes=kmeans).fit(current.pcs)
        tags["kmeans_regime"] = model.labels_
        models["kmeans"] = model.to_dataset()
    training = None
    if labelled_days is not None:
        table = read_labels(labelled_days)
        model = SupervisedRegimes(labels=None).fit(current.pcs, table)
        probabilities = model.predict_proba(current.pcs)
        tags["learned_regime"] = model.predict(current.pcs)
        tags["learned_confidence"] = np.max(np.asarray(probabilities), axis=1)
        models["supervised"] = model.to_dataset()
        training = {**model.cross_validate(current.pcs, table),
                    "labels": [str(label) for label in model.classes_],
                    "against_rules": pd.crosstab(
                        pd.Series(tags["learned_regime"].to_numpy(), name="learned"),
                        pd.Series(tags["regime"].astype(str).to_numpy(), name="rules"))}
    return tags, models, training


def updated_query_defaults(defaults: dict, settings: dict, *, n_modes: int,
                           owner: str = "save_query_defaults") -> dict:
    """``defaults`` with ``settings`` (``top``, ``n_modes``, ``metric``) checked and
    merged over them.

    ``top`` must be an integer >= 1, ``n_modes`` an integer from 1 to the store's
    ``n_modes`` EOF modes and ``metric`` one of ``P.metric``'s choices; None removes a
    setting.
    """
    unknown = sorted(set(settings) - set(QUERY_DEFAULT_KEYS))
    if unknown:
        raise AnalogsInputError(
            f"{owner} records {', '.join(QUERY_DEFAULT_KEYS)}; got {', '.join(unknown)}")
    merged = dict(defaults)
    for key, value in settings.items():
        if value is None:
            merged.pop(key, None)
        elif key == "top":
            merged[key] = P.top.check(value, owner)
        elif key == "metric":
            merged[key] = P.metric.check(value, owner)
        else:
            merged[key] = P.query_modes.check(value, owner, maximum=n_modes)
    return merged


def save_query_defaults(path, *, timeout=None, **settings):
    """Record query settings (``top``, ``n_modes``, ``metric``) in the manifest of the store at
    ``path`` (as ``analogs verify --tune --save`` does); return the new store, whose
    queries use them."""
    from analogs.workflows.analog_store import AnalogStore
    with store_io.transaction(path, timeout=timeout) as txn:
        manifest = store_io.editable(txn.manifest)
        n_modes = int(manifest["config"]["n_modes"])
        manifest["query_defaults"] = updated_query_defaults(
            manifest.get("query_defaults") or {}, settings, n_modes=n_modes)
        txn.carry(*txn.manifest["files"])
        txn.commit(manifest)
        return AnalogStore._load_version(txn.path, manifest=txn.committed)


def tag_file_sidecar(path) -> Path:
    """The metadata sidecar of a CSV tag file: ``NAME.csv-metadata.json`` beside it (the
    default location of the W3C "Metadata Vocabulary for Tabular Data" (CSVW, 2015) for
    a CSV file; from memory)."""
    path = Path(path)
    return path.with_name(path.name + "-metadata.json")


def write_tags(store, out) -> dict:
    """Write ``store``'s tags (one row a day) to ``out`` (.csv or .parquet) with their
    metadata (:func:`analogs.stages.regimes.tag_metadata`: units of every column, the
    diagnostic region and whether it was the default): in the Parquet file's key-value
    metadata (pandas ``DataFrame.attrs``, read back by ``pandas.read_parquet``), or for a
    CSV in a CSVW sidecar :func:`tag_file_sidecar` (the CSV itself stays a plain table).
    Returns the metadata."""
    import json

    import pandas as pd

    from analogs.stages.regimes import tag_metadata
    from analogs.workflows import files
    if store.tags is None:
        raise AnalogsInputError(f"store {store.path} has no tags; rebuild it with analogs build")
    out = Path(out)
    table = store.tags.reset_index()
    table["date"] = table["date"].dt.strftime("%Y-%m-%d")
    metadata = tag_metadata(store.tag_attrs, table.columns)
    if out.suffix.lower() == ".parquet":
        table.attrs = metadata
        files.write_table(table, out)
    else:
        files.write_table(table, out)
        columns = [{"name": name, "titles": name,
                    "datatype": "boolean" if pd.api.types.is_bool_dtype(table[name])
                    else "number" if pd.api.types.is_numeric_dtype(table[name]) else "string",
                    "schema:unitText": metadata["units"][name]} for name in table.columns]
        sidecar = {"@context": ["http://www.w3.org/ns/csvw", {"@language": "en"}],
                   "url": out.name, "dc:title": metadata["title"],
                   "dc:description": "regimes diagnosed over the "
                                     + metadata["diagnostic_region"]["description"],
                   "tableSchema": {"columns": columns}, "analogs": metadata}
        files.write_text(tag_file_sidecar(out), json.dumps(sidecar, indent=1) + "\n")
    return metadata

"""Workflows: re-classify a store's days (retag) and record its query defaults.

Each is one load-modify-write inside :func:`analogs.workflows.store.transaction` (the
current version is loaded after the writer lock is held) and returns the new store,
freshly loaded: a stored object never changes.

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
QUERY_DEFAULT_KEYS = ("top", "n_modes")


def retag_store(path, *, rules=None, kmeans=None, labelled_days=None, progress=False,
                timeout=None):
    """Re-classify every day of the store at ``path`` and keep the result (and any learned
    model) in the store; return the new store (its ``tags`` hold the new columns).

    ``rules`` (a TOML path or :class:`~analogs.stages.regimes.RegimeRules`) re-applies the
    rule classifier to the diagnostics kept at build, so no archive is needed.
    ``kmeans`` (number of clusters) adds unsupervised regimes of the PCs in a
    ``kmeans_regime`` column; ``labelled_days`` (a CSV of ``date,regime``) trains the
    supervised classifier and adds ``learned_regime`` and ``learned_confidence``.
    Learned models are stored as arrays in ``models.nc`` (never pickled). ``timeout``:
    seconds to wait for another writer.
    """
    from analogs.stages.regimes import RegimeRules
    from analogs.workflows.analog_store import AnalogStore
    if kmeans is not None:
        kmeans = P.kmeans.check(kmeans, "retag")
    if rules is not None and not isinstance(rules, RegimeRules):
        rules = RegimeRules.load(rules)
    with store_io.transaction(path, timeout=timeout) as txn:
        current = AnalogStore._load_version(Path(path), manifest=txn.manifest)
        tags, models = _classified(current, rules, kmeans, labelled_days)
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
        return AnalogStore._load_version(Path(path), manifest=txn.committed)


def _classified(current, rules, kmeans, labelled_days):
    """The new tags table of ``current`` and the learned models (name -> Dataset)."""
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
    if labelled_days is not None:
        model = SupervisedRegimes().fit(current.pcs, labelled_days)
        probabilities = model.predict_proba(current.pcs)
        tags["learned_regime"] = model.predict(current.pcs)
        tags["learned_confidence"] = np.max(np.asarray(probabilities), axis=1)
        models["supervised"] = model.to_dataset()
    return tags, models


def updated_query_defaults(defaults: dict, settings: dict, *, n_modes: int,
                           owner: str = "save_query_defaults") -> dict:
    """``defaults`` with ``settings`` (``top``, ``n_modes``) checked and merged over them.

    ``top`` must be an integer >= 1 and ``n_modes`` an integer from 1 to the store's
    ``n_modes`` EOF modes; None removes a setting.
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
        else:
            merged[key] = P.query_modes.check(value, owner, maximum=n_modes)
    return merged


def save_query_defaults(path, *, timeout=None, **settings):
    """Record query settings (``top``, ``n_modes``) in the manifest of the store at
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
        return AnalogStore._load_version(Path(path), manifest=txn.committed)

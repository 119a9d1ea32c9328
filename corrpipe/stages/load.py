"""Stage ``load``: read and validate the data catalogue (``[catalogue]``, ``[cosmology]``)."""

from __future__ import annotations

import logging

import h5py

from corrpipe.cosmology import CosmologySettings
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import cosmology_of, store_catalogue
from corrpipe.survey.catalog import CatalogueSettings

__all__ = ["STAGE", "TABLES"]

log = logging.getLogger(__name__)


def compute(ctx: StageContext):
    """Read and validate the data catalogue (``[catalogue]``, ``[cosmology]``)."""
    from corrpipe.survey.catalog import load_catalogue

    a = ctx.analysis
    cat = load_catalogue(a.catalogue, cosmology_of(a))
    log.info("[%s] load: %d objects kept from %s", a.name, len(cat.weights), a.catalogue.path)

    def fill(h5: h5py.File) -> None:
        store_catalogue(h5.create_group("data"), cat)

    return fill


TABLES = {"cosmology": CosmologySettings, "catalogue": CatalogueSettings}

STAGE = Stage("load", ("catalogue", "cosmology"), (), compute,
              inputs=lambda a: [a.catalogue.path])

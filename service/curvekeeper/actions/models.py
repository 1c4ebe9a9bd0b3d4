"""Loading and saving a channel's model, through the store's (channel, version) cache."""

from __future__ import annotations

from typing import Any

from ..core import ChannelModel
from ..store import Repository
from ..store.repository import LearningState
from ..store.tables import ChannelState


def summary_columns(model: ChannelModel) -> dict[str, Any]:
    """The denormalised summary the list filters use, from a model."""
    s = model.summary()
    return {"drift_state": s["drift"]["state"], "tolerance_state": s["drift"]["tolerance_state"],
            "rmse": s["rmse"]}


def read_model(repo: Repository, st: ChannelState | LearningState) -> ChannelModel:
    """The channel's current model, shared: read it, never change it."""
    model: ChannelModel | None = repo.cache.get(st.channel_pk, st.version)
    if model is None:
        model = ChannelModel.from_state(*repo.config_and_state(st.channel_pk))
        repo.cache.put(st.channel_pk, st.version, model)
    return model


def write_model(repo: Repository, st: ChannelState | LearningState) -> ChannelModel:
    """A private copy of the channel's current model, to change and then ``save_model``."""
    return read_model(repo, st).copy()


def save_model(repo: Repository, st: ChannelState | LearningState, model: ChannelModel, version: int,
               **columns: Any) -> None:
    """Write the model as the channel's state at ``version`` (one UPDATE); once the
    transaction commits, the cache holds it."""
    repo.save_state(st, model_state=model.to_state(), version=version, **summary_columns(model), **columns)
    pk = st.channel_pk
    repo.committed.append(lambda: repo.cache.put(pk, version, model))

"""Turning a validated config into working parts: codec, topic templates, initial models, engine.

Shared by ``trimtab run`` and ``trimtab replay`` so both build the engine the same way. The
engine is given its settings and the config's routing rules (:func:`engine_settings`), never
the config tree itself.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from trimtab.engine.engine import Engine
from trimtab.engine.settings import EngineSettings, Routing, spec_of
from trimtab.errors import ConfigError, DataError
from trimtab.model.online import RidgeModel
from trimtab.store.modelfile import load_model_file
from trimtab.wire.codec import JsonCodec, SenmlCodec
from trimtab.wire.topics import TopicTemplate

if TYPE_CHECKING:
    from trimtab.config import Config

Codec = JsonCodec | SenmlCodec


def make_codec(cfg: Config) -> Codec:
    """The payload codec the config names."""
    p = cfg.payload
    if p.format == "senml":
        return SenmlCodec(value_name=p.value_field, reference_name=p.reference_field,
                          window_name=p.window_field, covariates=dict(p.covariates),
                          max_bytes=p.max_bytes)
    return JsonCodec(time_field=p.time_field, value_field=p.value_field,
                     reference_field=p.reference_field, window_field=p.window_field,
                     covariates=dict(p.covariates), max_bytes=p.max_bytes)


def initial_models(cfg: Config) -> dict[str, RidgeModel]:
    """Load every initial model-state file the config names, checking its terms fit."""
    wanted: dict[str, list[str]] = {}
    names = [None, *cfg.sensors.ids, *cfg.sensors.overrides]
    for name in names:
        settings = cfg.sensors.defaults if name is None else cfg.sensor_settings(name)
        if settings.initial_state is not None:
            wanted.setdefault(str(settings.initial_state), []).append(name or "defaults")
    models: dict[str, RidgeModel] = {}
    for path, users in wanted.items():
        try:
            model, _ = load_model_file(Path(path))
        except DataError as exc:
            raise ConfigError(f"sensors: initial_state {path}: {exc}") from exc
        for user in users:
            settings = (cfg.sensors.defaults if user == "defaults"
                        else cfg.sensor_settings(user))
            if spec_of(settings) != model.spec:
                raise ConfigError(
                    f"sensors: initial_state {path} has terms {list(model.spec.names())} but "
                    f"sensor {user} is configured with {list(spec_of(settings).names())}"
                )
        models[path] = model
    return models


def engine_settings(cfg: Config) -> EngineSettings:
    """What an engine takes from a config: its sections and the routing of sensors."""
    return EngineSettings(
        learning=cfg.learning, output=cfg.output, pairing=cfg.pairing,
        routing=Routing(settings=cfg.sensor_settings, serves=cfg.sensor_allowed,
                        targets=cfg.reference_targets,
                        max_sensors=cfg.sensors.max),
    )


def make_engine(cfg: Config) -> Engine:
    """A fresh engine with the config's initial models loaded."""
    return Engine(engine_settings(cfg), initial_models(cfg))


def topic_templates(cfg: Config) -> tuple[TopicTemplate, TopicTemplate, TopicTemplate]:
    """Readings, references and corrected-output templates."""
    t = cfg.topics
    return TopicTemplate(t.readings), TopicTemplate(t.references), TopicTemplate(t.corrected)


def status_topic(cfg: Config) -> str:
    """The daemon's status topic with its client id filled in."""
    return cfg.topics.status.replace("{client_id}", cfg.broker.client_id)

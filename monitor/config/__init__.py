"""The configuration file (DESIGN.md section 8): pydantic models, a line-aware safe YAML loader,
and the helpers a pass needs.

One table, ``SETTINGS`` (``settings.py``), declares every key of the file with its default and its
meaning. The pydantic models (``models.py``) take their defaults and descriptions from it;
``plumbline schema`` prints it as JSON Schema or as the Markdown reference that the README carries;
a test checks the README's reference against the models, so the three cannot drift apart.

Public API::

    load_config(path) -> PlumblineConfig         read, validate, resolve paths; raises ConfigError
    parse_config(text, source=, base_dir=)       the same from text already in memory
    feed_columns(config, feed) -> frozenset      columns the models on a feed need
    models_of_feed(config, feed) -> dict         the models that read a feed
    model_signature(model) -> str                changes when response, predictors, interval
                                                 columns, per or intercept change
    lookup_feed / lookup_model(config, name)     by name, with a did-you-mean UsageError
    parse_schedule(text) -> timedelta | CronSchedule
    config_json_schema() -> dict / reference_markdown() -> str

A ``ConfigError`` message holds one line per problem, sorted by line:
``plumbline.yaml line 14: models.pick_hours.predictors[0]: column 'order_line' not in feed
depot_weekly (did you mean 'order_lines'?)``.
"""

from monitor.config.loader import LineLoader, load_config, parse_config
from monitor.config.models import (
    SECTIONS,
    Baseline,
    Compute,
    Email,
    Export,
    Feed,
    IntervalColumns,
    Model,
    Notify,
    PlumblineConfig,
    Problem,
    Schedule,
    Thresholds,
    config_json_schema,
    feed_columns,
    lookup_feed,
    lookup_model,
    model_signature,
    models_of_feed,
)
from monitor.config.schedule import CronSchedule, parse_schedule
from monitor.config.settings import SETTINGS, SETTINGS_BY_PATH, Setting, reference_markdown

__all__ = [
    "SECTIONS",
    "SETTINGS",
    "SETTINGS_BY_PATH",
    "Baseline",
    "Compute",
    "CronSchedule",
    "Email",
    "Export",
    "Feed",
    "IntervalColumns",
    "LineLoader",
    "Model",
    "Notify",
    "PlumblineConfig",
    "Problem",
    "Schedule",
    "Setting",
    "Thresholds",
    "config_json_schema",
    "feed_columns",
    "load_config",
    "lookup_feed",
    "lookup_model",
    "model_signature",
    "models_of_feed",
    "parse_config",
    "parse_schedule",
    "reference_markdown",
]

"""Imports every model module so that Base.metadata knows all tables (Alembic, tests)."""

from server.auth import models as auth_models  # noqa: F401
from server.db import Base
from server.devices import models as device_models  # noqa: F401
from server.households import models as household_models  # noqa: F401
from server.installations import models as installation_models  # noqa: F401
from server.quota import models as quota_models  # noqa: F401
from server.review import models as review_models  # noqa: F401
from server.staged import models as staged_models  # noqa: F401
from server.trials import models as trial_models  # noqa: F401

metadata = Base.metadata

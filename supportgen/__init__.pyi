"""Public API of supportgen, as IDEs and type checkers see it (the module loads some names lazily)."""

from .analysis.verify import check as check
from .errors import GeometryError as GeometryError
from .errors import MeshError as MeshError
from .errors import OutputError as OutputError
from .errors import PlacementError as PlacementError
from .errors import SettingsError as SettingsError
from .errors import SupportGenError as SupportGenError
from .physics.orientation import orient as orient
from .pipeline import Result as Result
from .pipeline import generate as generate
from .settings import PROFILES as PROFILES
from .settings import Settings as Settings
from .settings import load_settings as load_settings
from .supports.plan import Contacts as Contacts
from .supports.plan import SupportPlan as SupportPlan
from .supports.strategies import STRATEGIES as STRATEGIES

__version__: str
__all__: list[str]

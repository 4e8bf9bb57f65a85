from cdcnorm.mapping.load import LoadedMapping, load_mapping, load_mappings
from cdcnorm.mapping.model import Mapping

__all__ = ["LoadedMapping", "Mapping", "load_mapping", "load_mappings"]

"""Request and response models (pydantic v2): validate at the edge, convert to numpy and back."""

from service.schemas.common import Caps
from service.schemas.design import DesignRequest, DesignResponse
from service.schemas.design_convert import check_design_request, run_design

__all__ = ["Caps", "DesignRequest", "DesignResponse", "check_design_request", "run_design"]

"""Request and response models (pydantic v2) of the public contract, and nothing else."""

from service.schemas.design import DesignRequest, DesignResponse

__all__ = ["DesignRequest", "DesignResponse"]

# likewise: one image for the API and the fit workers (CPU only).
FROM python:3.12-slim

ENV PYTHONDONTWRITEBYTECODE=1 \
    PYTHONUNBUFFERED=1 \
    PIP_NO_CACHE_DIR=1

WORKDIR /app
COPY pyproject.toml README.md ./
COPY service ./service
COPY workers ./workers
# the API's description, served at /openapi.yaml and /openapi.json
COPY openapi.yaml ./service/api/openapi.yaml
RUN pip install . && useradd --system --uid 10001 likewise
USER likewise

EXPOSE 8000
CMD ["gunicorn", "--config", "python:service.webserver", "--bind", "0.0.0.0:8000", "--workers", "2", "--access-logfile", "-", "service.api:create_app()"]

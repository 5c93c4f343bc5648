# The one image of fixq; docker-compose.yml runs it as `fixq api` and `fixq worker`.
FROM python:3.11-slim
WORKDIR /app
COPY pyproject.toml README.md ./
COPY service service
COPY worker worker
RUN pip install --no-cache-dir . && useradd --system --no-create-home fixq
USER fixq
# numba caches compiled kernels; /app is read-only for the fixq user.
ENV PYTHONUNBUFFERED=1 NUMBA_CACHE_DIR=/tmp/numba-cache
EXPOSE 8000
CMD ["fixq", "api", "--host", "0.0.0.0"]

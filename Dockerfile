# The one image of fixq; docker-compose.yml runs it as `fixq api` and `fixq worker`.
FROM python:3.11-slim
WORKDIR /app
COPY pyproject.toml README.md ./
COPY service service
COPY worker worker
# The fixq user's own private folder (mode 0700) holds compiled kernels: numba's cache and fixq's
# generated modules run as that user, so they must not live where another user could plant one.
RUN pip install --no-cache-dir . && useradd --system --no-create-home fixq \
    && install -d -o fixq -m 0700 /var/cache/fixq
USER fixq
ENV PYTHONUNBUFFERED=1 NUMBA_CACHE_DIR=/var/cache/fixq/numba FIXQ_KERNEL_CACHE=/var/cache/fixq/kernels
EXPOSE 8000
CMD ["fixq", "api", "--host", "0.0.0.0"]

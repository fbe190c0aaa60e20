"""The archive bundle's RO-Crate, checked with the pinned ro-crate-py and roc-validator.

Usage:
  python check_crate.py seed CACHE     write roc-validator's HTTP cache (CACHE.sqlite) holding
                                       the RO-Crate 1.1 JSON-LD context, read from the file that
                                       ro-crate-py 0.13.0 ships (rocrate/data/ro-crate.jsonld),
                                       so `rocrate-validator validate --offline --cache-path
                                       CACHE` needs no network (roc-validator fetches the context
                                       from w3id.org otherwise; CI reaches package registries
                                       only). Nothing is fetched: the one URL is answered from
                                       that file.
  python check_crate.py load BUNDLE    load the crate with ro-crate-py, as a repository would:
                                       the root dataset's required properties (RO-Crate 1.1,
                                       "Root Data Entity": name, description, datePublished,
                                       license) are present, every file in the bundle is listed
                                       as a File entity, each listed file exists and its sha256
                                       and contentSize match the bytes.
Exit status 1 with one line per problem.
"""
import hashlib
import io
import json
import pathlib
import sys

CONTEXT_URL = "https://w3id.org/ro/crate/1.1/context"


def seed(cache: str) -> int:
    import requests
    import requests_cache
    import rocrate
    import urllib3

    context = pathlib.Path(rocrate.__file__).parent / "data" / "ro-crate.jsonld"
    body = context.read_bytes()
    if json.loads(body).get("@id") != CONTEXT_URL:
        print(f"{context} is not the RO-Crate 1.1 context (is rocrate pinned to 0.13.0?)")
        return 1

    class FromFile(requests.adapters.HTTPAdapter):
        def send(self, request, **_):
            if request.url != CONTEXT_URL:
                raise RuntimeError(f"only {CONTEXT_URL} is answered, not {request.url}")
            raw = urllib3.HTTPResponse(
                body=io.BytesIO(body),
                headers={"Content-Type": "application/ld+json"},
                status=200,
                preload_content=False,
                request_url=request.url,
            )
            return self.build_response(request, raw)

    # The same cache settings roc-validator 0.13.0 opens its cache with (utils/http.py).
    session = requests_cache.CachedSession(
        cache_name=cache,
        backend="sqlite",
        expire_after=-1,
        allowable_methods=("GET",),
        allowable_codes=(200, 302, 404),
    )
    session.mount("https://", FromFile())
    response = session.get(CONTEXT_URL, headers={"Accept": "application/ld+json, application/json"})
    if response.status_code != 200 or list(session.cache.urls()) != [CONTEXT_URL]:
        print(f"could not seed {cache}: status {response.status_code}")
        return 1
    print(f"{cache}.sqlite: {CONTEXT_URL} from {context}")
    return 0


def load(bundle: str) -> int:
    from rocrate.rocrate import ROCrate

    root = pathlib.Path(bundle)
    crate = ROCrate(root)
    bad = []
    for prop in ("name", "description", "datePublished", "license"):
        if not crate.root_dataset.get(prop):
            bad.append(f"root dataset: no {prop}")
    listed = {}
    for entity in crate.get_entities():
        types = entity.type if isinstance(entity.type, list) else [entity.type]
        if "File" in types:
            listed[entity.id] = entity
    on_disk = {
        str(p.relative_to(root))
        for p in root.rglob("*")
        if p.is_file() and p.name != "ro-crate-metadata.json"
    }
    for missing in sorted(on_disk - set(listed)):
        bad.append(f"{missing}: in the bundle but not listed in the crate")
    for rel, entity in sorted(listed.items()):
        path = root / rel
        if not path.is_file():
            bad.append(f"{rel}: listed but not in the bundle")
            continue
        data = path.read_bytes()
        if entity.get("sha256") != hashlib.sha256(data).hexdigest():
            bad.append(f"{rel}: sha256 differs from the crate's")
        if entity.get("contentSize") != str(len(data)):
            bad.append(f"{rel}: contentSize differs from the crate's")
    for line in bad:
        print(line)
    if not bad:
        print(f"{bundle}: ro-crate-py loads the crate; {len(listed)} files listed, hashes match")
    return 1 if bad else 0


if __name__ == "__main__":
    if len(sys.argv) != 3 or sys.argv[1] not in ("seed", "load"):
        sys.exit(__doc__)
    sys.exit(seed(sys.argv[2]) if sys.argv[1] == "seed" else load(sys.argv[2]))

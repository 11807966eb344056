//! The page's files, embedded in the binary: the vendored chart library with its licence, and the
//! page's own script and style sheet.
//!
//! Each file is linked as `/assets/{path}?v={digest}`, where the digest is the first 16 hex digits of
//! its SHA-256: a new build with a changed file links a new URL, so every file can be cached for a
//! year (`immutable`) and a browser never mixes an old script with a new page.

use std::sync::LazyLock;

use axum::extract::Path;
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use sha2::{Digest, Sha256};

/// The vendored chart library (Chart.js 4.6.1 from the npm package `chart.js`, its
/// `dist/chart.umd.min.js` unchanged; see `assets/chartjs/README.md`).
pub const CHART_JS: &str = "chartjs/chart.umd.min.js";

/// Its licence, served beside it and linked from every page.
pub const CHART_JS_LICENCE: &str = "/assets/chartjs/LICENSE.md";

struct Asset {
    path: &'static str,
    content_type: &'static str,
    body: &'static [u8],
}

const JAVASCRIPT: &str = "text/javascript; charset=utf-8";

static ASSETS: &[Asset] = &[
    Asset {
        path: CHART_JS,
        content_type: JAVASCRIPT,
        body: include_bytes!("../../assets/chartjs/chart.umd.min.js"),
    },
    Asset {
        path: "chartjs/LICENSE.md",
        content_type: "text/plain; charset=utf-8",
        body: include_bytes!("../../assets/chartjs/LICENSE.md"),
    },
    Asset {
        path: "consensor.js",
        content_type: JAVASCRIPT,
        body: include_bytes!("../../assets/consensor.js"),
    },
    Asset {
        path: "consensor.css",
        content_type: "text/css; charset=utf-8",
        body: include_bytes!("../../assets/consensor.css"),
    },
];

/// The digest of each asset, computed once.
static DIGESTS: LazyLock<Vec<String>> = LazyLock::new(|| {
    ASSETS
        .iter()
        .map(|asset| hex::encode(&Sha256::digest(asset.body)[..8]))
        .collect()
});

/// The URL that a page links for the asset at `path` (which must be one of [`ASSETS`]).
pub fn url(path: &str) -> String {
    let index = ASSETS
        .iter()
        .position(|asset| asset.path == path)
        .unwrap_or_else(|| panic!("no embedded asset {path:?}"));
    format!("/assets/{path}?v={}", DIGESTS[index])
}

/// `GET /assets/{*path}`: the embedded file, or a plain 404.
pub async fn serve(Path(path): Path<String>) -> Response {
    let Some(asset) = ASSETS.iter().find(|asset| asset.path == path) else {
        return (StatusCode::NOT_FOUND, "no such file").into_response();
    };
    super::typed_response(
        asset.body,
        asset.content_type,
        "public, max-age=31536000, immutable",
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_asset_has_a_versioned_url() {
        for asset in ASSETS {
            let link = url(asset.path);
            assert!(link.starts_with(&format!("/assets/{}?v=", asset.path)));
            assert_eq!(link.len(), "/assets/".len() + asset.path.len() + 3 + 16);
        }
    }

    #[test]
    fn the_vendored_library_is_the_published_file() {
        // SHA-256 of `package/dist/chart.umd.min.js` in the npm tarball chart.js-4.6.1.tgz, as
        // recorded in assets/chartjs/README.md: the file is vendored unchanged.
        let digest = hex::encode(Sha256::digest(ASSETS[0].body));
        assert_eq!(
            digest,
            "87364cc2b2a76a6684929e7d6b80b18a897794db38400caff1fcf1791c6925d2"
        );
    }
}

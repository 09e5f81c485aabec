//! Links of OGC API documents (landing page, process and job documents) and the relation and
//! media type names they use.

use serde::Serialize;
use utoipa::ToSchema;

/// The relation types defined by OGC API.
pub const OGC_REL: &str = "http://www.opengis.net/def/rel/ogc/1.0";
pub const JSON: &str = "application/json";

#[derive(Clone, Debug, Serialize, ToSchema)]
pub struct Link {
    pub href: String,
    pub rel: String,
    #[serde(rename = "type", skip_serializing_if = "Option::is_none")]
    pub media_type: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub title: Option<String>,
}

pub fn link(
    href: impl Into<String>,
    rel: impl Into<String>,
    media_type: &str,
    title: &str,
) -> Link {
    Link {
        href: href.into(),
        rel: rel.into(),
        media_type: Some(media_type.into()),
        title: Some(title.into()),
    }
}

"""Intended access of the sign-off pages and API: engineers submit, approvers sign and withdraw.

The review page is read-only and open to the three roles that handle fits; admin manages users
only (DESIGN.md, "Sign-off rules").
"""

POLICY = {
    "reviews.submit": {"engineer"},
    "reviews.review": {"engineer", "approver", "auditor"},
    "reviews.sign": {"approver"},
    "reviews.withdraw": {"approver"},
    "api_reviews.submit": {"engineer"},
    "api_reviews.sign": {"approver"},
    "api_reviews.queue_of_fits": "signed-in",
}
